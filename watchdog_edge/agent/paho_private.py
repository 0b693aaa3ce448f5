"""The two private steps of paho's client that the link replaces, kept in this one module.

paho 2.x has no public way to choose the socket a connection runs on, nor to hand a received
PUBLISH straight to ``on_message``. The link wants both for speed, so it replaces two private
methods of ``paho.mqtt.client.Client`` (both present, with these parameters, in paho 2.0 to 2.2):

- ``_create_socket`` opens every connection: here the connection runs on a ``BufferedSocket``
  (link_socket.py), which saves most of paho's system calls;
- ``_handle_on_message`` hands each received PUBLISH to the callbacks: here straight to
  ``on_message``, skipping paho's search for per-topic callbacks, of which the link registers
  none (it cost about a tenth of the agent's time per message).

Nothing else in the package touches paho's private names. ``client_class`` gives the client
with the two steps only when the installed paho has them as expected; otherwise paho's own
client, which the link runs as well: slower, and on stop the connection may close before
the broker has read the last packets (``BufferedSocket`` waits for the broker to close first),
so the broker re-sends what was not acknowledged and the agent recognises those re-sends.
The tests run the link on paho's own client against a real broker, and fail loudly when an
installed paho lacks the steps, so an upgrade that removes them is noticed.

>>> sorted(STEPS)
['_create_socket', '_handle_on_message']
"""

from __future__ import annotations

import inspect
import socket

import paho.mqtt.client as paho

from watchdog_edge.agent.link_socket import BufferedSocket

# The private methods replaced, with the parameters the replacements expect.
STEPS: dict[str, list[str]] = {"_create_socket": ["self"], "_handle_on_message": ["self", "message"]}


def missing_steps(cls: type = paho.Client) -> list[str]:
    """The private steps that ``cls`` lacks, or has with other parameters (none for paho 2.0 to 2.2).

    >>> missing_steps(), missing_steps(object)
    ([], ['_create_socket', '_handle_on_message'])
    """
    out = []
    for name, params in STEPS.items():
        step = getattr(cls, name, None)
        if step is None or list(inspect.signature(step).parameters) != params:
            out.append(name)
    return out


class FastClient(paho.Client):
    """paho's client with its two private steps replaced (see the module); build it through ``client_class``."""

    def _create_socket(self) -> paho.SocketLike:
        sock = super()._create_socket()
        # a TCP or TLS socket gets the buffers; anything else (a websocket wrapper) is left as is
        return BufferedSocket(sock) if isinstance(sock, socket.socket) else sock

    def _handle_on_message(self, message: paho.MQTTMessage) -> None:
        on_message = self.on_message
        if on_message is not None:
            on_message(self, None, message)


def client_class(fast: bool = True) -> type[paho.Client]:
    """The client the link builds: ``FastClient`` when asked for and the installed paho allows, else paho's own."""
    return FastClient if fast and not missing_steps() else paho.Client
