"""The SMTP edge: one connection per drain, messages sent to explicit envelope recipients, and failures
sorted into retry-later (connection trouble, 4xx) and give-up (5xx, bad login, untrusted TLS)."""

from __future__ import annotations

import smtplib
import ssl
from email.message import EmailMessage
from typing import NoReturn

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


class SmtpSession:
    """An open, logged-in SMTP connection."""

    def __init__(self, client: smtplib.SMTP, sender: str, secret: str | None) -> None:
        self._client = client
        self._sender = sender
        self._secret = secret

    def send(self, msg: EmailMessage, recipients: tuple[str, ...]) -> dict[str, tuple[int, bytes]]:
        """Send ``msg`` to exactly ``recipients``; returns the refused ones (others got it)."""
        try:
            return self._client.send_message(msg, from_addr=self._sender, to_addrs=list(recipients))
        except (smtplib.SMTPException, OSError) as exc:
            if isinstance(exc, smtplib.SMTPResponseException) and not isinstance(exc, smtplib.SMTPServerDisconnected):
                try:
                    self._client.rset()        # keep the connection usable for the next message
                except (smtplib.SMTPException, OSError):
                    pass
            classify(exc, self._secret)

    def close(self) -> None:
        try:
            self._client.quit()
        except (smtplib.SMTPException, OSError):
            self._client.close()


class EmailChannel:
    """Opens SMTP sessions (plain, STARTTLS or implicit TLS) and logs in if configured."""

    name = "email"

    def __init__(self, settings: EmailSettings) -> None:
        self.settings = settings

    def __repr__(self) -> str:
        s = self.settings
        return f"EmailChannel(host={s.host!r}, port={s.port}, security={s.security!r}, username={s.username!r})"

    def _tls_context(self) -> ssl.SSLContext:
        return ssl.create_default_context(cafile=str(self.settings.ca_file) if self.settings.ca_file else None)

    def connect(self) -> SmtpSession:
        """Connect, say EHLO, upgrade to TLS and log in as configured; raises RetryLater or GiveUp."""
        s = self.settings
        try:
            password = s.read_password()
        except ConfigError as exc:
            raise GiveUp(str(exc)) from None
        client: smtplib.SMTP | None = None
        try:
            if s.security == "tls":
                client = smtplib.SMTP_SSL(s.host, s.port, timeout=s.timeout, context=self._tls_context())
            else:
                client = smtplib.SMTP(s.host, s.port, timeout=s.timeout)
            client.ehlo()
            if s.security == "starttls":
                client.starttls(context=self._tls_context())
                client.ehlo()
            if s.username is not None:
                client.login(s.username, password or "")
            return SmtpSession(client, s.sender, password)
        except (smtplib.SMTPException, OSError) as exc:
            if client is not None:
                client.close()
            classify(exc, password)
