"""The alert sender: a thread that takes alerts from the outbox and delivers them.

The outbox is two tables of the ledger (see :mod:`calwarden.daemon.stores.outbox`);
the sender has its own connection to it, in its own thread, so that a slow or
absent mail server never holds up a verdict. It writes only the outbox; it reads
the verdicts its alerts are about, and the control log for inline charts. Each cycle it

1. adds the daily summary when one is due (off by default);
2. releases new alerts: each is composed once, written as an ``.eml`` file in
   ``<state>/outbox/`` and given a delivery per configured channel; beyond the
   throttle's quota alerts are *gathered*, and go out as one digest when the
   window allows;
3. delivers what is due, retrying temporary failures with exponential backoff
   and jitter, and moving permanent refusals to ``<state>/dead-letter/``.

A message's Message-ID comes from the alert's dedupe key, so a crash between
handing it to the server and recording that leads to one identical resend at
most, which mail readers recognise.
"""

from __future__ import annotations

import os
import random
import threading
import time
from collections.abc import Callable
from contextlib import suppress
from datetime import UTC, datetime, timedelta
from email.message import EmailMessage
from email.parser import BytesParser
from email.policy import SMTP
from email.utils import getaddresses
from pathlib import Path
from typing import TYPE_CHECKING, Any

import structlog

from calwarden.daemon.alerts.content import (
    daemon_alert,
    digest_alert,
    email_message,
    header_text,
    payload_bytes,
    webhook_payload,
)
from calwarden.daemon.alerts.settings import AlertSettings
from calwarden.daemon.alerts.transport import DeliveryError, post_webhook, send_email
from calwarden.daemon.control_log.log import series_name
from calwarden.daemon.outputs.files import atomic_write
from calwarden.daemon.settings.control import ControlSettings
from calwarden.daemon.stores.control import ControlHistory
from calwarden.daemon.stores.database import (
    LEDGER_NAME,
    Database,
    LedgerError,
    StoreUnavailable,
    Target,
)
from calwarden.daemon.stores.outbox import Delivery, Outbox, StoredAlert
from calwarden.daemon.stores.records import NewAlert, SeriesKey, timestamp

if TYPE_CHECKING:
    from calwarden.daemon.outputs.pictures import ChartCriteria

log = structlog.get_logger("calwarden")

OUTBOX_FOLDER = "outbox"
DEAD_LETTER_FOLDER = "dead-letter"
#: Kinds that skip the throttle: a digest is the throttle's own message, and the
#: daemon's trouble and the daily summary are rare and must not wait.
_UNTHROTTLED = ("digest", "summary", "test", "daemon")
_IDLE_WAIT = 5.0


def message_file_name(alert: StoredAlert) -> str:
    """``20261201T224012Z-000042-fail.eml``: sorts by time, names the alert."""
    moment = datetime.fromisoformat(alert.created_at).astimezone(UTC)
    return f"{moment:%Y%m%dT%H%M%SZ}-{alert.id:06d}-{alert.kind}.eml"


def write_message(path: Path, message: EmailMessage) -> None:
    """A message as an RFC 5322 ``.eml`` file (CRLF line ends), written atomically."""
    path.parent.mkdir(parents=True, exist_ok=True)
    atomic_write(path, message.as_bytes(policy=SMTP))


def daemon_trouble(event: str, message: str, **details: object) -> NewAlert:
    """An outbox alert about the daemon itself (observer restarted, inbox gone, fault)."""
    when = timestamp()
    return NewAlert(
        dedupe_key=f"daemon:{event}:{when}",
        kind="daemon",
        inbox=None,
        instrument=None,
        created_at=when,
        summary=payload_bytes(daemon_alert(event, message, when, **details)),
    )


class AlertSender:
    """Delivers the outbox's alerts until :meth:`stop`; see the module's description."""

    def __init__(
        self,
        state_dir: Path,
        settings: AlertSettings,
        control: ControlSettings | None = None,
        *,
        criteria: ChartCriteria | None = None,
        clock: Callable[[], float] = time.time,
        ledger: Target | None = None,
        retry_seconds: float = 5.0,
    ) -> None:
        self.state_dir = state_dir
        self.ledger = ledger if ledger is not None else state_dir / LEDGER_NAME
        self._retry_seconds = retry_seconds  # while the ledger's server is away
        self.settings = settings
        self.control = control
        self.criteria = criteria  # the runs' acceptance window, on a chart without limits
        self.outbox_dir = state_dir / OUTBOX_FOLDER
        self.dead_letter_dir = state_dir / DEAD_LETTER_FOLDER
        self._clock = clock
        self._wake = threading.Event()
        self._stop = threading.Event()
        self._settled = threading.Event()
        self._requests = 0
        self._requests_lock = threading.Lock()
        self._thread: threading.Thread | None = None
        self._outbox: Outbox | None = None
        self._control_log: ControlHistory | None = None
        self._release_failed = False
        self._lease = 0.0
        self.fault: str | None = None

    # ------------------------------------------------------------------ life cycle

    def start(self) -> None:
        self._thread = threading.Thread(target=self._run, name="calwarden-alerts", daemon=True)
        self._thread.start()

    def wake(self) -> None:
        """Something new may be in the outbox: look now."""
        with self._requests_lock:
            self._requests += 1
            self._settled.clear()
        self._wake.set()

    def stop(self, timeout: float = 10.0) -> None:
        """Finish the delivery in hand (bounded by the SMTP timeout) and end the thread."""
        self._stop.set()
        self._wake.set()
        if self._thread is not None:
            self._thread.join(timeout)

    def wait_settled(self, timeout: float) -> bool:
        """Block until nothing in the outbox is due now (for tests and the demo)."""
        return self._settled.wait(timeout)

    # ------------------------------------------------------------------ the loop

    def _open(self) -> Database | None:
        """The sender's own connection; while the server is away, tried again until stopped."""
        while True:
            try:
                return Database(self.ledger)
            except StoreUnavailable as error:
                log.warning("alert_sender_store_away", reason=str(error))
                self._settled.set()
                if self._stop.wait(self._retry_seconds):
                    return None
            except LedgerError as error:
                self.fault = str(error)
                log.critical("alert_sender_fault", reason=str(error))
                self._settled.set()
                return None

    def _run(self) -> None:
        opened = self._open()
        if opened is None:
            return
        database = opened
        self._outbox = Outbox(database)
        self._control_log = ControlHistory(database)
        # On a shared server a claimed delivery is left alone by the other senders for
        # longer than an attempt can take (a sender that dies leaves it to them after).
        self._lease = (self.settings.email.timeout_seconds + 60.0) if database.shared else 0.0
        try:
            while not self._stop.is_set():
                with self._requests_lock:
                    requests = self._requests
                self._wake.clear()
                try:
                    wait = self._cycle()
                except StoreUnavailable as error:
                    # The server is away: the alerts wait in it; try again shortly.
                    log.warning("alert_sender_store_away", reason=str(error))
                    wait = self._retry_seconds
                    if not self._stop.wait(wait):
                        with suppress(LedgerError):  # still away: the next cycle says so
                            database.reconnect()
                except LedgerError as error:
                    # The worker will meet the same fault and stop the daemon; keep trying.
                    log.error("alert_sender_ledger_error", reason=str(error))
                    wait = _IDLE_WAIT
                except Exception:  # a bug of ours: said loudly; the alerts stay in the outbox
                    log.exception("alert_sender_bug")
                    wait = _IDLE_WAIT
                with self._requests_lock:
                    if requests == self._requests and wait > 0:
                        self._settled.set()
                self._wake.wait(max(0.0, min(wait, _IDLE_WAIT)))
        finally:
            self._settled.set()
            database.close()

    def _cycle(self) -> float:
        """One pass over the outbox; returns how long to wait before the next."""
        assert self._outbox is not None
        self._daily_summary()
        self._dispatch()
        for delivery in self._outbox.due(self._clock(), lease_seconds=self._lease):
            if self._stop.is_set():
                return 0.0
            self._deliver(delivery)
        now = self._clock()
        waits = [_IDLE_WAIT]
        upcoming = self._outbox.next_attempt()
        if upcoming is not None:
            waits.append(upcoming - now)
        if self._outbox.any_in("gathered"):
            window = self.settings.throttle.window_minutes * 60
            _, oldest = self._outbox.released_since(now - window)
            waits.append((oldest + window - now) if oldest is not None else 0.0)
        if self._outbox.any_in("new") and not self._release_failed:
            waits.append(0.0)
        return max(0.0, min(waits))

    # ------------------------------------------------------------------ release

    def _channels(self) -> tuple[str, ...]:
        channels = []
        if self.settings.email.host:
            channels.append("email")
        if self.settings.webhook.url:
            channels.append("webhook")
        return tuple(channels)

    def _dispatch(self) -> None:
        assert self._outbox is not None
        window = self.settings.throttle.window_minutes * 60
        quota = self.settings.throttle.max_messages
        held: list[StoredAlert] = []
        backlog = self._outbox.any_in("gathered")
        released, _ = self._outbox.released_since(self._clock() - window)
        self._release_failed = False
        for alert in self._outbox.alerts_in("new"):
            if alert.kind in _UNTHROTTLED:
                self._try_release(alert)
            elif not backlog and not held and released < quota:
                released += self._try_release(alert)
            else:
                held.append(alert)  # in order: once one waits, the later ones wait too
        if held:
            self._outbox.gather([alert.id for alert in held])
            for alert in held:
                log.info("alert_gathered", alert=alert.id, kind=alert.kind, inbox=alert.inbox)
        if not (held or backlog):
            return
        # Counted again: the daemon alerts released above count towards the quota too.
        released, _ = self._outbox.released_since(self._clock() - window)
        if released >= quota:
            return  # the window is still full: the digest comes later
        gathered = self._outbox.alerts_in("gathered")
        if gathered:
            self._send_digest(gathered)

    def _send_digest(self, gathered: list[StoredAlert]) -> None:
        """One digest standing for the gathered alerts, released at once."""
        assert self._outbox is not None
        when = timestamp()
        summary = digest_alert([a.summary for a in gathered], when)
        summary["recipients"] = list(
            dict.fromkeys(
                address
                for a in gathered
                for address in self.settings.recipients(a.kind, a.inbox, a.instrument)
            )
        )
        digest = NewAlert(
            dedupe_key=f"digest:{gathered[0].id}-{gathered[-1].id}",
            kind="digest",
            inbox=None,
            instrument=None,
            created_at=when,
            summary=payload_bytes(summary),
        )
        digest_id = self._outbox.make_digest(digest, [a.id for a in gathered], self._clock())
        log.info("alert_digest_made", alert=digest_id, alerts=len(gathered))
        for alert in self._outbox.alerts_in("new"):
            if alert.kind == "digest":
                self._try_release(alert)

    def _recipients(self, alert: StoredAlert) -> tuple[str, ...]:
        if alert.kind == "digest":
            return tuple(alert.summary.get("recipients") or self.settings.email.to)
        return self.settings.recipients(alert.kind, alert.inbox, alert.instrument)

    def compose(self, alert: StoredAlert) -> EmailMessage:
        """The alert's message, composed from its stored summary (identically on a resend)."""
        assert self._outbox is not None
        verdict = None
        if self.settings.attach_verdict and alert.evaluation_id is not None:
            verdict = self._outbox.verdict_of(alert.evaluation_id)
        return email_message(
            alert.summary,
            dedupe_key=alert.dedupe_key,
            created_at=alert.created_at,
            sender=self.settings.email.sender,
            recipients=self._recipients(alert),
            verdict=verdict,
            charts=self._charts(alert),
        )

    def _charts(self, alert: StoredAlert) -> list[tuple[str, bytes]]:
        """Control charts of the series a control rule fired on, drawn now, from the log."""
        series = alert.summary.get("control_series") or []
        if not series or self.control is None or self.settings.inline_charts == 0:
            return []
        from calwarden.daemon.outputs.drawing import control_chart_png
        from calwarden.daemon.outputs.pictures import build_chart, safe_name

        assert self._control_log is not None
        pictures = []
        for entry in series:
            if entry.get("kind") not in self.control.kinds:
                continue
            key = SeriesKey(
                str(entry["instrument"]),
                str(entry["analyte"]),
                str(entry["kind"]),
                str(entry.get("level") or ""),
            )
            try:
                chart = build_chart(self._control_log, self.control, key, self.criteria)
                png = control_chart_png(chart)
            except Exception as error:  # a picture is a courtesy; the alert goes without it
                log.warning("alert_chart_failed", alert=alert.id, error=repr(error))
                continue
            caption = safe_name(series_name(key))
            pictures.append((caption, png))
            if len(pictures) >= self.settings.inline_charts:
                break
        return pictures

    def _try_release(self, alert: StoredAlert) -> bool:
        """Release one alert; a failure (the outbox folder unwritable, a bug composing this
        one alert) is logged and tried again next cycle, without holding up the others."""
        try:
            self._release(alert)
        except LedgerError:
            raise
        except Exception as error:
            self._release_failed = True
            log.error("alert_not_written", alert=alert.id, kind=alert.kind, error=repr(error))
            return False
        return True

    def _release(self, alert: StoredAlert) -> None:
        assert self._outbox is not None
        message = self.compose(alert)
        name = message_file_name(alert)
        write_message(self.outbox_dir / name, message)
        if not self._outbox.release(alert.id, self._channels(), self._clock(), name):
            # Another daemon on the same server released it first: its message stands.
            (self.outbox_dir / name).unlink(missing_ok=True)
            log.info("alert_released_elsewhere", alert=alert.id, kind=alert.kind)
            return
        log.info(
            "alert_written",
            alert=alert.id,
            kind=alert.kind,
            inbox=alert.inbox,
            file=str(self.outbox_dir / name),
            channels=list(self._channels()),
        )

    # ------------------------------------------------------------------ delivery

    def _message(self, delivery: Delivery) -> EmailMessage:
        """The message as written at release; composed again if the file is gone."""
        name = delivery.alert.message_file
        if name:
            try:
                data = (self.outbox_dir / name).read_bytes()
            except OSError:
                pass
            else:
                parsed = BytesParser(policy=SMTP).parsebytes(data)
                assert isinstance(parsed, EmailMessage)
                return parsed
        return self.compose(delivery.alert)

    def _deliver(self, delivery: Delivery) -> None:
        assert self._outbox is not None
        alert = delivery.alert
        started = self._clock()
        try:
            if delivery.channel == "email":
                message = self._message(delivery)
                recipients = [
                    address for _, address in getaddresses(message.get_all("To", [])) if address
                ]
                refused = send_email(self.settings.email, message, recipients)
                if refused:
                    log.warning("alert_recipients_refused", alert=alert.id, refused=refused)
            else:
                token = None
                if self.settings.webhook.token_env:
                    token = os.environ.get(self.settings.webhook.token_env)
                post_webhook(
                    self.settings.webhook,
                    webhook_payload(
                        alert.summary, dedupe_key=alert.dedupe_key, created_at=alert.created_at
                    ),
                    token,
                )
        except DeliveryError as error:
            self._failed(delivery, error, started)
            return
        except LedgerError:
            raise
        except Exception as error:  # a bug of ours: the message waits and is tried again
            log.exception("alert_delivery_bug", alert=alert.id)
            self._failed(delivery, DeliveryError(f"internal error: {error!r}"), started)
            return
        self._outbox.finish(delivery, "sent", timestamp())
        log.info(
            "alert_sent",
            alert=alert.id,
            kind=alert.kind,
            channel=delivery.channel,
            attempts=delivery.attempts + 1,
            file=alert.message_file,
        )

    def _failed(self, delivery: Delivery, error: DeliveryError, started: float) -> None:
        assert self._outbox is not None
        alert = delivery.alert
        first = delivery.first_attempt if delivery.first_attempt is not None else started
        given_up = self._clock() - first > self.settings.retry.give_up_hours * 3600
        if error.permanent or given_up:
            reason = str(error) if error.permanent else f"gave up retrying: {error}"
            # The copy first: once the ledger says dead, the copy is there to be found.
            self._dead_letter(alert, delivery.channel, reason)
            self._outbox.finish(delivery, "dead", timestamp(), reason)
            log.error(
                "alert_dead_letter",
                alert=alert.id,
                kind=alert.kind,
                channel=delivery.channel,
                reason=reason,
                folder=str(self.dead_letter_dir),
            )
            return
        retry = self.settings.retry
        delay = min(retry.max_seconds, retry.first_seconds * 2**delivery.attempts)
        # Seeded by the delivery, so the jitter is reproducible yet differs between alerts.
        delay *= random.Random(f"{alert.id}:{delivery.channel}:{delivery.attempts}").uniform(
            0.8, 1.2
        )
        self._outbox.postpone(delivery, self._clock() + delay, first, str(error))
        (log.error if error.config else log.warning)(
            "alert_config_problem" if error.config else "alert_retry",
            alert=alert.id,
            channel=delivery.channel,
            attempts=delivery.attempts + 1,
            retry_in_seconds=round(delay, 1),
            reason=str(error),
        )

    def _dead_letter(self, alert: StoredAlert, channel: str, reason: str) -> None:
        """A copy of the refused message beside a note of why, where status points to."""
        try:
            self.dead_letter_dir.mkdir(parents=True, exist_ok=True)
            name = alert.message_file or message_file_name(alert)
            source = self.outbox_dir / name
            data = source.read_bytes() if source.exists() else b""
            if data:
                atomic_write(self.dead_letter_dir / name, data)
            note = f"{channel}: {reason}\n"
            atomic_write(self.dead_letter_dir / f"{name}.{channel}.txt", note.encode("utf-8"))
        except OSError as error:
            log.error("dead_letter_write_failed", alert=alert.id, error=repr(error))

    # ------------------------------------------------------------------ daily summary

    def _daily_summary(self) -> None:
        summary = self.settings.daily_summary
        if not summary.enabled:
            return
        assert self._outbox is not None
        local_now = datetime.fromtimestamp(self._clock()).astimezone()
        hour, minute = (int(part) for part in summary.at.split(":"))
        due = local_now.replace(hour=hour, minute=minute, second=0, microsecond=0)
        if local_now < due:
            return
        key = f"summary:{due:%Y-%m-%d}"
        if self._outbox.has_alert(key):
            return
        judged = self._outbox.judged_between(timestamp(due - timedelta(days=1)), timestamp(due))
        counts: dict[str, Any] = {"pass": 0, "fail": 0, "error": 0}
        for outcome, *_ in judged:
            counts[outcome] = counts.get(outcome, 0) + 1
        not_passed = [
            f"{outcome.upper()} {run or f'{inbox}/{path}'}"
            for outcome, inbox, path, run in judged
            if outcome != "pass"
        ]
        when = timestamp()
        content = {
            "kind": "summary",
            "day": f"{due:%Y-%m-%d}",
            "until": f"{due:%Y-%m-%d %H:%M %Z}".strip(),
            "judged": len(judged),
            **counts,
            "not_passed": not_passed[:100],
            "evaluated_at": when,
        }
        self._outbox.add_alert(NewAlert(key, "summary", None, None, when, payload_bytes(content)))


def emergency_alert(state_dir: Path, settings: AlertSettings, alert: NewAlert) -> None:
    """Deliver an alert the ledger could not take: an .eml file if possible, and e-mail now.

    Used when the ledger itself is the trouble, so nothing here may depend on it.
    """
    import json

    stored = StoredAlert(
        0,
        alert.dedupe_key,
        alert.kind,
        None,
        None,
        None,
        alert.created_at,
        json.loads(alert.summary),
    )
    message = email_message(
        stored.summary,
        dedupe_key=alert.dedupe_key,
        created_at=alert.created_at,
        sender=settings.email.sender,
        recipients=settings.recipients(alert.kind, None, None),
    )
    try:
        write_message(state_dir / OUTBOX_FOLDER / message_file_name(stored), message)
    except OSError as error:
        log.error("emergency_alert_not_written", error=repr(error))
    if settings.email.host:
        try:
            send_email(settings.email, message, settings.recipients(alert.kind, None, None))
        except DeliveryError as error:
            log.error("emergency_alert_not_sent", reason=str(error))
        else:
            log.info("emergency_alert_sent", kind=alert.kind)


def send_test_message(settings: AlertSettings, state_dir: Path) -> list[str]:
    """``calwarden alert test``: one message through every configured channel, now.

    Returns what was done, one line each; raises DeliveryError on the first channel
    that fails. With no channel configured, the message is written to the outbox folder.
    """
    import socket

    when = timestamp()
    host = header_text(socket.gethostname(), 60)
    content = {
        "kind": "test",
        "message": f"test message from calwarden on {host}",
        "evaluated_at": when,
    }
    stored = StoredAlert(0, f"test:{when}", "test", None, None, None, when, content)
    recipients = settings.email.to or tuple(
        dict.fromkeys(address for route in settings.routes for address in route.to)
    )
    message = email_message(
        content,
        dedupe_key=stored.dedupe_key,
        created_at=when,
        sender=settings.email.sender,
        recipients=recipients,
    )
    done = []
    if settings.email.host:
        refused = send_email(settings.email, message, recipients)
        done.append(
            f"sent a test message to {', '.join(a for a in recipients if a not in refused)} "
            f"via {settings.email.host}:{settings.email.effective_port} "
            f"({settings.email.security})"
        )
        done.extend(f"refused for {address}: {why}" for address, why in refused.items())
    if settings.webhook.url:
        token = os.environ.get(settings.webhook.token_env) if settings.webhook.token_env else None
        post_webhook(
            settings.webhook,
            webhook_payload(content, dedupe_key=stored.dedupe_key, created_at=when),
            token,
        )
        done.append(f"posted a test alert to the webhook {settings.webhook.url}")
    if not done:
        path = state_dir / OUTBOX_FOLDER / message_file_name(stored).replace("-000000-", "-")
        write_message(path, message)
        done.append(
            "no SMTP server is configured (alerts.email.host), so alerts are written as .eml "
            f"files only; a test message was written to {path}"
        )
    return done
