"""Mail servers that misbehave, on loopback: one accepts and never answers, one dribbles its banner."""

from __future__ import annotations

import socket
import threading
import time


class FaultyServer:
    """A TCP listener on 127.0.0.1. ``mode="silent"``: accept and say nothing; ``mode="dribble"``: send a
    220 banner one byte every ``byte_every`` seconds (a line that never ends in time). Counts connections."""

    def __init__(self, mode: str, port: int = 0, byte_every: float = 5.0) -> None:
        if mode not in ("silent", "dribble"):
            raise ValueError(mode)
        self.mode = mode
        self.byte_every = byte_every
        self._sock = socket.socket(socket.AF_INET, socket.SOCK_STREAM)
        self._sock.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
        self._sock.bind(("127.0.0.1", port))
        self._sock.listen(16)
        self._sock.settimeout(0.1)
        self.port: int = self._sock.getsockname()[1]
        self.connections = 0
        self.bytes_sent = 0
        self._stop = threading.Event()
        self._conns: list[socket.socket] = []
        self._threads: list[threading.Thread] = []
        self._lock = threading.Lock()

    def start(self) -> FaultyServer:
        th = threading.Thread(target=self._accept, name="faulty-smtp-accept", daemon=True)
        th.start()
        self._threads.append(th)
        return self

    def _accept(self) -> None:
        while not self._stop.is_set():
            try:
                conn, _ = self._sock.accept()
            except TimeoutError:
                continue
            except OSError:
                return
            with self._lock:
                self.connections += 1
                self._conns.append(conn)
            if self.mode == "dribble":
                th = threading.Thread(target=self._dribble, args=(conn,), name="faulty-smtp-dribble", daemon=True)
                th.start()
                self._threads.append(th)

    def _dribble(self, conn: socket.socket) -> None:
        banner = b"220 " + b"x" * 10_000 + b"\r\n"
        for i in range(len(banner)):
            if self._stop.wait(self.byte_every if i else 0.0):
                return
            try:
                conn.sendall(banner[i:i + 1])
            except OSError:
                return
            with self._lock:
                self.bytes_sent += 1

    def wait_connected(self, timeout: float) -> bool:
        end = time.monotonic() + timeout
        while time.monotonic() < end:
            if self.connections:
                return True
            time.sleep(0.05)
        return False

    def stop(self) -> None:
        self._stop.set()
        self._sock.close()
        with self._lock:
            for c in self._conns:
                c.close()
        for th in self._threads:
            th.join(5)

    def __enter__(self) -> FaultyServer:
        return self.start()

    def __exit__(self, *exc: object) -> None:
        self.stop()


class Sink:
    """A working SMTP server (aiosmtpd) on 127.0.0.1:``port`` that keeps every message's raw bytes."""

    def __init__(self, port: int) -> None:
        from aiosmtpd.controller import Controller

        self.port = port
        self.received: list[bytes] = []

        sink = self

        class Handler:
            async def handle_DATA(self, server: object, session: object, envelope: object) -> str:
                sink.received.append(bytes(getattr(envelope, "original_content", None)
                                           or getattr(envelope, "content", b"")))
                return "250 OK"

        self.controller = Controller(Handler(), hostname="127.0.0.1", port=port)

    def __enter__(self) -> Sink:
        self.controller.start()
        return self

    def __exit__(self, *exc: object) -> None:
        self.controller.stop()
