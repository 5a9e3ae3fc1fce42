"""A TCP relay in front of a real redis-server that cuts connections under calls in
flight, the way a failover does: the client has sent a command and its connection
closes before (or while) the answer comes back.

Modes, switchable at any moment:

* ``pass``: bytes flow both ways;
* ``swallow``: a command is read and the connection closed; the server never sees it;
* ``drop_reply``: the command reaches the server (which runs it) and the connection
  closes instead of the reply;
* ``half_reply``: half of the reply is sent, then the connection closes.
"""

from __future__ import annotations

import socket
import threading
from collections.abc import Iterator
from contextlib import contextmanager, suppress

MODES = ("pass", "swallow", "drop_reply", "half_reply")


class Relay:
    def __init__(self, target_port: int) -> None:
        self.target_port = target_port
        self.mode = "pass"
        self.cuts = 0
        self._listener = socket.create_server(("127.0.0.1", 0))
        self.port: int = self._listener.getsockname()[1]
        self._lock = threading.Lock()
        self._open: set[socket.socket] = set()
        self._running = True
        threading.Thread(target=self._accept, daemon=True).start()

    @property
    def url(self) -> str:
        return f"redis://127.0.0.1:{self.port}/0"

    def close(self) -> None:
        self._running = False
        self._listener.close()
        with self._lock:
            for sock in list(self._open):
                _shut(sock)

    def _accept(self) -> None:
        while self._running:
            try:
                client, _ = self._listener.accept()
            except OSError:
                return
            try:
                server = socket.create_connection(("127.0.0.1", self.target_port))
            except OSError:
                _shut(client)
                continue
            with self._lock:
                self._open |= {client, server}
            threading.Thread(target=self._commands, args=(client, server), daemon=True).start()
            threading.Thread(target=self._replies, args=(client, server), daemon=True).start()

    def _commands(self, client: socket.socket, server: socket.socket) -> None:
        while data := _receive(client):
            if self.mode == "swallow":
                break
            with suppress(OSError):
                server.sendall(data)
        self._cut(client, server)

    def _replies(self, client: socket.socket, server: socket.socket) -> None:
        while data := _receive(server):
            mode = self.mode
            if mode == "half_reply" and len(data) > 1:
                with suppress(OSError):
                    client.sendall(data[: len(data) // 2])
            if mode in ("drop_reply", "half_reply"):
                break
            with suppress(OSError):
                client.sendall(data)
        self._cut(client, server)

    def _cut(self, client: socket.socket, server: socket.socket) -> None:
        with self._lock:
            if client in self._open:
                self.cuts += 1
            self._open -= {client, server}
        _shut(client)
        _shut(server)


def _receive(sock: socket.socket) -> bytes:
    try:
        return sock.recv(65536)
    except OSError:
        return b""


def _shut(sock: socket.socket) -> None:
    with suppress(OSError):
        sock.shutdown(socket.SHUT_RDWR)
    sock.close()


@contextmanager
def relay(target_port: int) -> Iterator[Relay]:
    running = Relay(target_port)
    try:
        yield running
    finally:
        running.close()
