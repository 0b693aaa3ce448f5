"""BufferedSocket on real sockets: large reads served in small pieces, writes in one send."""

from __future__ import annotations

import select
import socket

import pytest

from watchdog_edge.agent.link_socket import BufferedSocket


@pytest.fixture
def pair():
    a, b = socket.socketpair()
    a.setblocking(False)
    yield BufferedSocket(a), b
    a.close()
    b.close()


def test_small_reads_come_from_one_large_read(pair):
    buf, peer = pair
    data = bytes(range(256)) * 4
    peer.sendall(data)
    select.select([buf], [], [], 2.0)
    got = buf.recv(1)
    # Everything the kernel held was taken by that one read ...
    assert buf.pending() == len(data) - 1
    assert select.select([buf.sock], [], [], 0)[0] == []
    # ... and paho's next reads (length byte, then the rest) are served from it, in order.
    got += buf.recv(1) + buf.recv(10_000)
    assert got == data and buf.pending() == 0
    with pytest.raises(BlockingIOError):
        buf.recv(1)  # nothing left anywhere: the socket's own answer


def test_sends_wait_for_flush_and_leave_together(pair):
    buf, peer = pair
    packets = [bytes([0x40, 2, 0, k]) for k in range(1, 11)]  # ten PUBACKs
    for p in packets:
        assert buf.send(p) == 4
    assert buf.has_output()
    peer.setblocking(False)
    with pytest.raises(BlockingIOError):
        peer.recv(100)  # nothing was written yet
    assert buf.flush() is True and not buf.has_output()
    peer.setblocking(True)
    assert peer.recv(100) == b"".join(packets)


def test_flush_keeps_what_the_kernel_did_not_take(pair):
    buf, peer = pair
    big = bytes(range(256)) * 8192  # 2 MiB: more than a socket buffer holds
    buf.send(big)
    assert buf.flush() is False and buf.has_output()
    received = bytearray()
    peer.settimeout(2.0)
    while len(received) < len(big):
        received += peer.recv(1 << 20)
        buf.flush()
    assert bytes(received) == big and not buf.has_output()


def test_a_write_error_surfaces_at_the_next_read(pair):
    buf, peer = pair
    peer.close()
    buf.send(b"\x40\x02\x00\x01")
    assert buf.flush() is False
    assert isinstance(buf.error, OSError)
    with pytest.raises(OSError):
        buf.recv(1)


def test_close_sends_what_is_queued(pair):
    buf, peer = pair
    buf.send(b"\xe0\x00")  # a DISCONNECT
    buf.close()
    peer.settimeout(2.0)
    assert peer.recv(10) == b"\xe0\x00"


def test_after_a_disconnect_close_waits_for_the_peer_so_no_reset_loses_the_last_bytes():
    # Closing a TCP socket that still holds unread data sends a reset, and the peer may then
    # lose what it had not read yet. After expect_close(), close() reads until the peer has
    # closed its side, so the peer gets every byte however late it reads.
    import threading
    import time

    server = socket.create_server(("127.0.0.1", 0))
    client = socket.create_connection(server.getsockname())
    peer, _ = server.accept()
    client.setblocking(False)
    buf = BufferedSocket(client)
    peer.sendall(b"x" * 100_000)  # never read by the client side
    got = bytearray()
    peer_closed = threading.Event()

    def broker_side() -> None:
        time.sleep(0.2)  # reads only after the client has decided to close
        peer.settimeout(2.0)
        while b"bye" not in got:
            got.extend(peer.recv(100))
        peer_closed.set()  # just before: close() can only return after this close
        peer.close()

    th = threading.Thread(target=broker_side)
    th.start()
    buf.send(b"bye")
    buf.expect_close()
    buf.close()
    closed_after_peer = peer_closed.is_set()
    th.join(5)
    server.close()
    assert bytes(got) == b"bye"  # no reset cost the peer its last bytes
    assert closed_after_peer
