"""The socket under the MQTT link: reads in large chunks, writes what paho queued in one send.

paho reads every packet with three ``recv`` calls (type byte, length, body) and writes every
packet, each PUBACK included, with its own ``send``. At a few thousand messages a second
those system calls cost more than the rest of the message. ``BufferedSocket`` sits between
paho and the real socket (plain or TLS):

- ``recv`` serves paho's small reads from one large read of what the kernel holds;
  ``pending()`` says how much is still buffered, as an ``ssl.SSLSocket`` does, so the link
  keeps reading without waiting in ``select`` for data it already has;
- ``send`` only appends to an output buffer; ``flush()`` hands it to the kernel in one call,
  keeps what the kernel did not take for the next ``flush`` and never blocks;
- an error while flushing is kept and raised by the next ``recv``, where paho looks for a
  lost connection;
- after a DISCONNECT it closes only once the broker has closed its side, so that no reset
  can make the broker drop the last bytes it was sent.
"""

from __future__ import annotations

import socket
import ssl
import time
from typing import Any

_READ_SIZE = 65536
_WOULD_BLOCK = (BlockingIOError, ssl.SSLWantReadError, ssl.SSLWantWriteError, InterruptedError)


class BufferedSocket:
    """A connected, non-blocking socket with a read buffer and an output buffer (see the module)."""

    def __init__(self, sock: socket.socket | ssl.SSLSocket) -> None:
        self.sock = sock
        self._rbuf = b""
        self._rpos = 0
        self._wbuf = bytearray()
        self.error: OSError | None = None
        self._ssl_pending = getattr(sock, "pending", None)
        self._drain_before_close = False

    def fileno(self) -> int:
        """The real socket's descriptor (for select)."""
        return self.sock.fileno()

    def recv(self, size: int) -> bytes:
        """Up to ``size`` bytes, from the buffer when it holds any, else from one large read."""
        buf, pos = self._rbuf, self._rpos
        if pos < len(buf):
            end = min(pos + size, len(buf))
            self._rpos = end
            return buf[pos:end]
        if self.error is not None:
            raise self.error
        data = self.sock.recv(_READ_SIZE)
        if len(data) <= size:
            return data
        self._rbuf, self._rpos = data, size
        return data[:size]

    def pending(self) -> int:
        """Bytes received and not yet read by paho (TLS's own buffer included)."""
        n = len(self._rbuf) - self._rpos
        if self._ssl_pending is not None:
            n += self._ssl_pending()
        return n

    def send(self, data: bytes | bytearray) -> int:
        """Queue ``data``; it leaves at the next ``flush``."""
        self._wbuf += data
        return len(data)

    def has_output(self) -> bool:
        """True while queued bytes wait for ``flush``."""
        return bool(self._wbuf)

    def flush(self) -> bool:
        """Write what is queued without blocking; True when nothing is left."""
        wbuf = self._wbuf
        while wbuf:
            try:
                n = self.sock.send(wbuf)
            except _WOULD_BLOCK:
                return False
            except OSError as e:
                # The connection is gone: paho learns it from the next recv.
                self.error = e
                wbuf.clear()
                return False
            del wbuf[:n]
        return True

    def close(self) -> None:
        """Send what is queued (a DISCONNECT, say) within a second, then close.

        After ``expect_close()`` it first reads until the broker closes its side (a second at
        most): closing a socket that holds unread data sends a reset, and a reset can make
        the broker drop our last PUBACKs and the DISCONNECT before it has read them.
        """
        sock = self.sock
        try:
            if self.error is None and (self._wbuf or self._drain_before_close):
                sock.settimeout(1.0)
                if self._wbuf:
                    sock.sendall(self._wbuf)
                if self._drain_before_close:
                    deadline = time.monotonic() + 1.0
                    while time.monotonic() < deadline and sock.recv(_READ_SIZE):
                        pass
        except (OSError, ValueError):
            pass
        self._wbuf.clear()
        sock.close()

    def expect_close(self) -> None:
        """A DISCONNECT is on its way: let ``close`` wait for the broker to close first."""
        self._drain_before_close = True

    def __getattr__(self, name: str) -> Any:
        # setblocking, settimeout, getpeercert, ...: whatever paho asks of the real socket.
        return getattr(self.sock, name)
