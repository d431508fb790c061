"""Handing a message to an SMTP server or a webhook, and saying what went wrong.

Every failure becomes a :class:`DeliveryError` that says whether trying again
can help. A 5xx reply to the message or its recipients is permanent (the
message goes to the dead-letter folder); a 4xx reply, a timeout, a refused or
broken connection are temporary. A refused login, a missing password or a
certificate that does not verify are *configuration* faults: temporary, since
the message is fine and will go once the setting is fixed, but logged loudly.
"""

from __future__ import annotations

import functools
import json
import smtplib
import socket
import ssl
import urllib.error
import urllib.request
from collections.abc import Sequence
from email.message import EmailMessage
from typing import Any

from calwarden.daemon.alerts.settings import EmailSettings, WebhookSettings


class DeliveryError(Exception):
    """A message was not delivered; ``permanent`` when trying again cannot help."""

    def __init__(self, message: str, *, permanent: bool = False, config: bool = False) -> None:
        super().__init__(message)
        self.permanent = permanent
        self.config = config  # a setting is wrong (login, password, certificate)


def _tls_context(verify: bool, ca_file: object = None) -> ssl.SSLContext:
    context = ssl.create_default_context(cafile=str(ca_file) if ca_file else None)
    if not verify:
        context.check_hostname = False
        context.verify_mode = ssl.CERT_NONE
    return context


@functools.cache
def _local_name() -> str:
    """The name given in EHLO, looked up once: smtplib would ask DNS on every connection,
    which can take seconds where the lab's resolver is slow."""
    return socket.getfqdn()


def _where(settings: EmailSettings) -> str:
    return f"{settings.host}:{settings.effective_port} ({settings.security})"


def _connect(settings: EmailSettings) -> smtplib.SMTP:
    assert settings.host is not None
    timeout = settings.timeout_seconds
    context = _tls_context(settings.verify_certificate, settings.ca_file)
    if settings.security == "ssl":
        return smtplib.SMTP_SSL(
            settings.host,
            settings.effective_port,
            local_hostname=_local_name(),
            timeout=timeout,
            context=context,
        )
    client = smtplib.SMTP(
        settings.host, settings.effective_port, local_hostname=_local_name(), timeout=timeout
    )
    try:
        if settings.security == "starttls":
            client.ehlo()
            if not client.has_extn("starttls"):
                raise DeliveryError(
                    f"{_where(settings)} does not offer STARTTLS; set email.security to "
                    "'ssl' or, for a local relay only, 'none'",
                    config=True,
                )
            client.starttls(context=context)
            client.ehlo()
    except BaseException:
        client.close()
        raise
    return client


def _login(client: smtplib.SMTP, settings: EmailSettings) -> None:
    if settings.username is None:
        return
    try:
        password = settings.password()
    except KeyError as error:
        raise DeliveryError(
            f"the SMTP password's environment variable {error} is not set", config=True
        ) from None
    except OSError as error:
        raise DeliveryError(f"cannot read the SMTP password file: {error}", config=True) from None
    assert password is not None
    try:
        client.login(settings.username, password)
    except smtplib.SMTPAuthenticationError as error:
        raise DeliveryError(
            f"{_where(settings)} refused the login for {settings.username}: "
            f"{error.smtp_code} {_text(error.smtp_error)}",
            config=True,
        ) from None


def _text(reply: bytes | str) -> str:
    return reply.decode("utf-8", "replace") if isinstance(reply, bytes) else str(reply)


def send_email(
    settings: EmailSettings, message: EmailMessage, recipients: Sequence[str]
) -> dict[str, str]:
    """Deliver one message; returns the recipients refused while others took it.

    Raises DeliveryError, saying whether to try again, when nobody took it.
    """
    if not recipients:
        raise DeliveryError("nobody to send this alert to (email.to and routes)", permanent=True)
    where = _where(settings)
    try:
        client = _connect(settings)
        try:
            _login(client, settings)
            refused = client.send_message(
                message, from_addr=settings.sender, to_addrs=list(recipients)
            )
        finally:
            try:
                client.quit()
            except (smtplib.SMTPException, OSError):
                client.close()
    except DeliveryError:
        raise
    except smtplib.SMTPRecipientsRefused as error:
        codes = [code for code, _ in error.recipients.values()]
        detail = "; ".join(
            f"{address}: {code} {_text(reply)}"
            for address, (code, reply) in error.recipients.items()
        )
        raise DeliveryError(
            f"{where} refused every recipient: {detail}", permanent=all(c >= 500 for c in codes)
        ) from None
    except smtplib.SMTPResponseException as error:
        raise DeliveryError(
            f"{where} replied {error.smtp_code} {_text(error.smtp_error)}",
            permanent=error.smtp_code >= 500,
        ) from None
    except ssl.SSLCertVerificationError as error:
        raise DeliveryError(
            f"{where}: the server's certificate does not verify ({error.verify_message}); "
            "give its authority in email.ca_file",
            config=True,
        ) from None
    except smtplib.SMTPNotSupportedError as error:
        raise DeliveryError(f"{where}: {error}", config=True) from None
    except (smtplib.SMTPException, OSError) as error:  # refused, reset, timed out, DNS
        raise DeliveryError(f"cannot reach {where}: {error or type(error).__name__}") from None
    # Some recipients took it: delivered; the sender logs the others.
    return {address: f"{code} {_text(reply)}" for address, (code, reply) in refused.items()}


def post_webhook(settings: WebhookSettings, payload: dict[str, Any], token: str | None) -> None:
    """POST one alert as JSON; raises DeliveryError saying whether to try again."""
    assert settings.url is not None
    headers = {"Content-Type": "application/json; charset=utf-8", "User-Agent": "calwarden"}
    if token:
        headers["Authorization"] = f"Bearer {token}"
    request = urllib.request.Request(
        settings.url,
        data=json.dumps(payload, ensure_ascii=False).encode("utf-8"),
        headers=headers,
        method="POST",
    )
    context = (
        _tls_context(settings.verify_certificate) if settings.url.startswith("https") else None
    )
    try:
        with urllib.request.urlopen(request, timeout=settings.timeout_seconds, context=context):
            return
    except urllib.error.HTTPError as error:
        retry = error.code in (408, 425, 429) or error.code >= 500
        raise DeliveryError(
            f"the webhook replied {error.code} {error.reason}", permanent=not retry
        ) from None
    except (urllib.error.URLError, OSError) as error:
        raise DeliveryError(f"cannot reach the webhook: {error}") from None
