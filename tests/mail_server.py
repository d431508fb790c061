"""A scriptable aiosmtpd handler for the alert tests, and a free loopback port.

(pytest puts this folder on the import path: ``from mail_server import Recorder``.)
"""

from __future__ import annotations

import socket
from dataclasses import dataclass, field
from email import message_from_bytes
from email.message import EmailMessage
from email.policy import default

from aiosmtpd.smtp import SMTP, Envelope, Session


@dataclass(frozen=True)
class Received:
    """One message the server accepted: its envelope and its bytes."""

    mail_from: str
    rcpt_tos: tuple[str, ...]
    content: bytes

    def message(self) -> EmailMessage:
        parsed = message_from_bytes(self.content, policy=default)
        assert isinstance(parsed, EmailMessage)
        return parsed


@dataclass
class Recorder:
    """An aiosmtpd handler that keeps every accepted message and replies as scripted.

    ``rcpt_replies`` and ``data_replies`` are used up one per command; when empty,
    the server accepts.
    """

    rcpt_replies: list[str] = field(default_factory=list)
    data_replies: list[str] = field(default_factory=list)
    received: list[Received] = field(default_factory=list)
    data_commands: int = 0

    async def handle_RCPT(
        self,
        server: SMTP,
        session: Session,
        envelope: Envelope,
        address: str,
        rcpt_options: list[str],
    ) -> str:
        if self.rcpt_replies:
            return self.rcpt_replies.pop(0)
        envelope.rcpt_tos.append(address)
        return "250 OK"

    async def handle_DATA(self, server: SMTP, session: Session, envelope: Envelope) -> str:
        self.data_commands += 1
        if self.data_replies:
            return self.data_replies.pop(0)
        content = envelope.original_content or b""
        self.received.append(
            Received(str(envelope.mail_from), tuple(envelope.rcpt_tos), bytes(content))
        )
        return "250 Message accepted for delivery"


def free_port() -> int:
    """A port nothing listens on now (aiosmtpd cannot be given port 0)."""
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as probe:
        probe.bind(("127.0.0.1", 0))
        port: int = probe.getsockname()[1]
    return port
