"""The SMTP edge: one connection per pass, an overall deadline on every exchange, messages sent to explicit
envelope recipients, and failures sorted into retry-later (connection trouble, 4xx, deadline) and give-up
(5xx, bad login, untrusted TLS)."""

from __future__ import annotations

import contextlib
import smtplib
import socket
import ssl
import threading
from email.message import EmailMessage
from typing import Any, NoReturn

from monitor.alerts.delivery import GiveUp, RetryLater
from monitor.alerts.settings import EmailSettings
from monitor.errors import ConfigError


def redact(text: str, secret: str | None) -> str:
    """``text`` with every occurrence of ``secret`` masked."""
    return text.replace(secret, "***") if secret else text


def classify(exc: BaseException, secret: str | None) -> NoReturn:
    """Raise RetryLater or GiveUp for an smtplib / socket / TLS error; the text never holds the password."""
    if isinstance(exc, smtplib.SMTPRecipientsRefused):
        codes = [code for code, _ in exc.recipients.values()]
        text = redact(f"all recipients refused: {exc.recipients}", secret)
        if codes and all(c >= 500 for c in codes):
            raise GiveUp(text) from None
        raise RetryLater(text) from None
    if isinstance(exc, smtplib.SMTPNotSupportedError):
        raise GiveUp(redact(f"server lacks a required extension: {exc}", secret)) from None
    if isinstance(exc, smtplib.SMTPResponseException):
        err = exc.smtp_error
        reply = err.decode("utf-8", "replace") if isinstance(err, bytes) else str(err)
        text = redact(f"SMTP {exc.smtp_code} {reply}".strip(), secret)
        if 500 <= exc.smtp_code <= 599:
            raise GiveUp(text) from None
        raise RetryLater(text) from None
    if isinstance(exc, ssl.SSLCertVerificationError):
        raise GiveUp(f"TLS certificate not trusted: {exc.verify_message}; set alerts.email.ca_file") from None
    raise RetryLater(redact(f"{type(exc).__name__}: {exc}", secret)) from None


def exchange_deadline(settings: EmailSettings) -> float:
    """Seconds one SMTP exchange (connect, banner, EHLO, STARTTLS, AUTH and one message) may take in all:
    ``alerts.email.deadline_seconds``.

    smtplib's ``timeout`` bounds each socket read only: a server that dribbles a byte now and then would
    keep a session alive for ever (smtplib timeouts are per operation).
    """
    return settings.deadline_seconds


class _Client(smtplib.SMTP):
    """smtplib.SMTP that keeps hold of its socket from the moment it exists (so a deadline can cut it)."""

    early_sock: Any = None
    _host: str

    def _get_socket(self, host: str, port: int, timeout: float) -> socket.socket:
        sock = super()._get_socket(host, port, timeout)  # type: ignore[misc]
        self.early_sock = sock
        return sock


class _TlsClient(_Client, smtplib.SMTP_SSL):
    """The same over implicit TLS: ``SMTP_SSL._get_socket`` wraps the socket ``_Client`` keeps hold of."""


class Deadline:
    """Cuts the client's socket when an exchange runs past its time (or on ``cut()``), so the blocked
    smtplib call fails at once instead of waiting for the server."""

    def __init__(self) -> None:
        self._lock = threading.Lock()
        self._client: _Client | _TlsClient | None = None
        self._timer: threading.Timer | None = None
        self.expired_after: float | None = None     # the deadline that was hit, seconds
        self.aborted = False

    def attach(self, client: _Client | _TlsClient) -> None:
        with self._lock:
            self._client = client
            if self.aborted:
                self._shut(client)

    def arm(self, seconds: float) -> None:
        """Start (or restart) the clock for one exchange."""
        self.disarm()
        timer = threading.Timer(seconds, self._expire, args=(seconds,))
        timer.daemon = True
        timer.name = "lotwarden-smtp-deadline"
        with self._lock:
            self._timer = timer
        timer.start()

    def disarm(self) -> None:
        with self._lock:
            timer, self._timer = self._timer, None
        if timer is not None:
            timer.cancel()

    def cut(self) -> None:
        """Abort now (shutdown): the exchange in flight fails and no new one starts."""
        with self._lock:
            self.aborted = True
            if self._client is not None:
                self._shut(self._client)

    def _expire(self, seconds: float) -> None:
        with self._lock:
            self.expired_after = seconds
            if self._client is not None:
                self._shut(self._client)

    @staticmethod
    def _shut(client: _Client | _TlsClient) -> None:
        sock = getattr(client, "sock", None) or client.early_sock
        if sock is None:
            return
        with contextlib.suppress(OSError):
            socket.socket.shutdown(sock, socket.SHUT_RDWR)   # the raw shutdown, also under TLS

    def explain(self, exc: RetryLater) -> RetryLater:
        """Name the deadline (or the shutdown) as the cause of a failure it provoked."""
        if self.aborted:
            return RetryLater("SMTP exchange cut short by shutdown; the alerts stay in the outbox")
        if self.expired_after is not None:
            return RetryLater(f"SMTP exchange took longer than its {self.expired_after:g} s deadline "
                              f"(server too slow or not answering): {exc}")
        return exc


class SmtpSession:
    """An open, logged-in SMTP connection; each message is one exchange with its own deadline."""

    def __init__(self, client: _Client | _TlsClient, sender: str, secret: str | None,
                 deadline: Deadline, seconds: float) -> None:
        self._client = client
        self._sender = sender
        self._secret = secret
        self._deadline = deadline
        self._seconds = seconds

    def send(self, msg: EmailMessage, recipients: tuple[str, ...]) -> dict[str, tuple[int, bytes]]:
        """Send ``msg`` to exactly ``recipients``; returns the refused ones (others got it)."""
        try:
            try:
                return self._client.send_message(msg, from_addr=self._sender, to_addrs=list(recipients))
            finally:
                self._deadline.arm(self._seconds)       # the next message: a new exchange, a new deadline
        except (smtplib.SMTPException, OSError) as exc:
            if self._deadline.expired_after is None and not self._deadline.aborted and \
                    isinstance(exc, smtplib.SMTPResponseException) and \
                    not isinstance(exc, smtplib.SMTPServerDisconnected):
                with contextlib.suppress(smtplib.SMTPException, OSError):
                    self._client.rset()        # keep the connection usable for the next message
            try:
                classify(exc, self._secret)
            except RetryLater as retry:
                raise self._deadline.explain(retry) from None

    def close(self) -> None:
        """QUIT (within what is left of the deadline), then let go of the deadline."""
        try:
            if self._deadline.expired_after is None and not self._deadline.aborted:
                self._client.quit()
            else:
                self._client.close()
        except (smtplib.SMTPException, OSError):
            self._client.close()
        finally:
            self._deadline.disarm()


class EmailChannel:
    """Opens SMTP sessions (plain, STARTTLS or implicit TLS) and logs in if configured, under a deadline."""

    name = "email"

    def __init__(self, settings: EmailSettings) -> None:
        self.settings = settings
        self._lock = threading.Lock()
        self._current: Deadline | None = None
        self._aborted = False

    def __repr__(self) -> str:
        s = self.settings
        return f"EmailChannel(host={s.host!r}, port={s.port}, security={s.security!r}, username={s.username!r})"

    def _tls_context(self) -> ssl.SSLContext:
        return ssl.create_default_context(cafile=str(self.settings.ca_file) if self.settings.ca_file else None)

    def abort(self) -> None:
        """Cut the exchange in flight and open no more sessions (shutdown)."""
        with self._lock:
            self._aborted = True
            current = self._current
        if current is not None:
            current.cut()

    def connect(self) -> SmtpSession:
        """Connect, say EHLO, upgrade to TLS and log in as configured; raises RetryLater or GiveUp.

        The deadline starts here and covers everything up to the end of the first message.
        """
        s = self.settings
        try:
            password = s.read_password()
        except ConfigError as exc:
            raise GiveUp(str(exc)) from None
        deadline = Deadline()
        with self._lock:
            if self._aborted:
                raise RetryLater("shutting down; the alerts stay in the outbox")
            self._current = deadline
        seconds = exchange_deadline(s)
        deadline.arm(seconds)
        client: _Client | _TlsClient | None = None
        try:
            if s.security == "tls":
                client = _TlsClient(timeout=s.timeout, context=self._tls_context())
            else:
                client = _Client(timeout=s.timeout)
            client._host = s.host       # what SMTP(host) would set: the name TLS checks the certificate for
            deadline.attach(client)
            client.connect(s.host, s.port)
            client.ehlo()
            if s.security == "starttls":
                client.starttls(context=self._tls_context())
                client.ehlo()
            if s.username is not None:
                client.login(s.username, password or "")
            return SmtpSession(client, s.sender, password, deadline, seconds)
        except (smtplib.SMTPException, OSError) as exc:
            deadline.disarm()
            if client is not None:
                client.close()
            try:
                classify(exc, password)
            except RetryLater as retry:
                raise deadline.explain(retry) from None
