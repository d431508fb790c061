"""The alerts section of a configuration: defaults, refusals in plain words, routes, password."""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import pytest

from calwarden.daemon.alerts.settings import ALERT_KINDS, AlertSettings, EmailSettings
from calwarden.daemon.cli.main import main
from calwarden.daemon.settings.config import build_config, load_config, plan_watch
from calwarden.rules.errors import ConfigError

QC_LEAD = "qc-lead@brindlewick.example"
METALS_LEAD = "metals-lead@brindlewick.example"
ICP_TEAM = "icp-team@brindlewick.example"
IT_DESK = "it-desk@brindlewick.example"
SECRET = "Brindlewick-smtp-7f3a91"


def _alerts(section: dict[str, Any]) -> AlertSettings:
    """The alert settings of a configuration holding only this alerts section."""
    return build_config({"alerts": section}, "test.yaml").alerts


def _refusal(section: dict[str, Any]) -> str:
    """The message of the ConfigError an alerts section raises."""
    with pytest.raises(ConfigError) as caught:
        build_config({"alerts": section}, "test.yaml")
    return str(caught.value)


@pytest.fixture
def routed() -> AlertSettings:
    """Settings with a route by inbox, one by instrument for failures, one for daemon alerts."""
    return _alerts(
        {
            "email": {"host": "smtp.brindlewick.example", "to": [QC_LEAD]},
            "routes": [
                {"inbox": "metals", "to": [METALS_LEAD]},
                {"instrument": "BWL-ICPMS-2", "kinds": ["fail"], "to": [ICP_TEAM, METALS_LEAD]},
                {"kinds": ["daemon"], "to": [IT_DESK]},
            ],
        }
    )


# --------------------------------------------------------------------------- defaults


def test_default_has_no_host_so_files_only() -> None:
    """By default no SMTP host is set: alerts are only written as .eml files."""
    assert AlertSettings().email.host is None
    assert AlertSettings().enabled


def test_default_security_is_starttls_on_587() -> None:
    """By default the connection is upgraded with STARTTLS on port 587."""
    email = AlertSettings().email
    assert email.security == "starttls"
    assert email.effective_port == 587


@pytest.mark.parametrize(("security", "port"), [("ssl", 465), ("none", 25), ("starttls", 587)])
def test_default_port_follows_security(security: str, port: int) -> None:
    """Without a port, ssl uses 465, none 25 and starttls 587."""
    assert EmailSettings.model_validate({"security": security}).effective_port == port


def test_explicit_port_wins() -> None:
    """A port given in the configuration is used whatever the security."""
    assert EmailSettings.model_validate({"security": "ssl", "port": 2465}).effective_port == 2465


def test_default_verifies_the_certificate() -> None:
    """By default the server's certificate is checked."""
    assert AlertSettings().email.verify_certificate is True


def test_default_kinds_are_all_four() -> None:
    """By default fail, error, control and daemon all raise alerts."""
    assert AlertSettings().kinds == ("fail", "error", "control", "daemon")
    assert AlertSettings().kinds == ALERT_KINDS


def test_default_throttle_is_five_per_ten_minutes() -> None:
    """By default five messages go out one by one per ten-minute window."""
    throttle = AlertSettings().throttle
    assert (throttle.max_messages, throttle.window_minutes) == (5, 10.0)


def test_default_daily_summary_is_off() -> None:
    """By default no daily summary is sent."""
    assert AlertSettings().daily_summary.enabled is False


def test_empty_configuration_gives_default_alerts() -> None:
    """A configuration without an alerts section has the default alert settings."""
    assert build_config({}, "test.yaml").alerts == AlertSettings()


# --------------------------------------------------------------------------- refusals


def test_unknown_key_is_refused_with_its_path() -> None:
    """An unknown key in the alerts section is refused, naming its dotted path."""
    assert _refusal({"email": {"hots": "smtp.brindlewick.example"}}).startswith(
        "test.yaml: alerts.email.hots: unknown key"
    )


@pytest.mark.parametrize(
    ("section", "hint"),
    [
        ({"email": {"hots": "smtp.brindlewick.example"}}, "(did you mean host?)"),
        ({"throtle": {"max_messages": 3}}, "(did you mean throttle?)"),
    ],
    ids=["email.hots", "throtle"],
)
def test_misspelt_alerts_key_suggests_the_right_one(section: dict[str, Any], hint: str) -> None:
    """A misspelt alerts key gets a did-you-mean hint naming the key it resembles."""
    assert _refusal(section).endswith(f"unknown key {hint}")


def test_host_without_recipients_is_refused() -> None:
    """An SMTP host with neither email.to nor routes is refused: nobody would hear."""
    message = _refusal({"email": {"host": "smtp.brindlewick.example"}})
    assert "email.host is set but neither email.to nor routes name anyone" in message


def test_host_with_routes_only_is_accepted() -> None:
    """An SMTP host with routes but no email.to is accepted."""
    alerts = _alerts({"email": {"host": "smtp.brindlewick.example"}, "routes": [{"to": [QC_LEAD]}]})
    assert alerts.email.to == ()


def test_password_env_and_file_together_are_refused() -> None:
    """Giving both password_env and password_file is refused."""
    message = _refusal({"email": {"password_env": "BWL_PW", "password_file": "pw.txt"}})
    assert "give email.password_env or email.password_file, not both" in message


@pytest.mark.parametrize(
    "address",
    [
        "qc-lead@brindlewick.example\r\nBcc: someone@example.org",
        "qc-lead@brindlewick.example\nBcc: someone@example.org",
        "qc-lead@brindlewick.example,someone@example.org",
        "Lab Lead <qc-lead@brindlewick.example>",
        "qc-lead.brindlewick.example",
    ],
    ids=["CRLF", "LF", "comma", "display-name", "no-at"],
)
def test_bad_recipient_address_is_refused(address: str) -> None:
    """A recipient that is not one plain address is refused, naming it."""
    message = _refusal({"email": {"to": [address]}})
    assert message.startswith("test.yaml: alerts.email.to: ")
    assert "is not a plain e-mail address (name@domain)" in message


def test_bad_route_address_is_refused() -> None:
    """A route's address with a line break is refused, naming the route."""
    message = _refusal({"routes": [{"to": ["a@brindlewick.example\r\nBcc: someone@example.org"]}]})
    assert message.startswith("test.yaml: alerts.routes[0].to: ")


def test_bad_sender_is_refused() -> None:
    """A sender address with a line break is refused."""
    message = _refusal({"email": {"sender": "calwarden@brindlewick.example\nBcc: x@example.org"}})
    assert message.startswith("test.yaml: alerts.email.sender: ")


@pytest.mark.parametrize(
    "bad", ["\t", "\x00", "\x85", "\u2028"], ids=["TAB", "NUL", "NEL", "LINE-SEPARATOR"]
)
def test_recipient_with_other_control_character_is_refused(bad: str) -> None:
    """A recipient holding any control or line-separator character is refused at load."""
    message = _refusal({"email": {"to": [f"qc-lead@brindlewick.example{bad}x"]}})
    assert "is not a plain e-mail address" in message


@pytest.mark.parametrize("url", ["ftp://hooks.example.org/x", "file:///etc/passwd", "hooks/x"])
def test_webhook_url_must_be_http(url: str) -> None:
    """A webhook URL that is not http:// or https:// is refused."""
    message = _refusal({"webhook": {"url": url}})
    assert message == (
        "test.yaml: alerts.webhook.url: the webhook url must start with http:// or https://"
    )


def test_https_webhook_is_accepted() -> None:
    """An https webhook URL is accepted as given."""
    url = "https://hooks.example.org/brindlewick"
    assert _alerts({"webhook": {"url": url}}).webhook.url == url


@pytest.mark.parametrize("at", ["24:00", "7:00", "07:60", "seven", "07:00:00"])
def test_bad_daily_summary_time_is_refused(at: str) -> None:
    """A daily_summary.at that is not HH:MM is refused, naming the key."""
    assert _refusal({"daily_summary": {"at": at}}).startswith("test.yaml: alerts.daily_summary.at:")


def test_bad_daily_summary_time_is_explained_in_plain_words() -> None:
    """The refusal of a bad daily_summary.at says HH:MM instead of showing a pattern."""
    message = _refusal({"daily_summary": {"at": "7:00"}})
    assert "HH:MM" in message
    assert "pattern" not in message


def test_unknown_alert_kind_is_refused() -> None:
    """A kind that is not fail, error, control or daemon is refused, naming the list."""
    message = _refusal({"kinds": ["fial"]})
    assert message.startswith("test.yaml: alerts.kinds[0]: ")
    assert "'fail', 'error', 'control' or 'daemon'" in message


# --------------------------------------------------------------------------- recipients


def test_route_by_inbox(routed: AlertSettings) -> None:
    """An error from the metals inbox goes to the metals route only."""
    assert routed.recipients("error", "metals", "BWL-LC-1") == (METALS_LEAD,)


def test_route_by_inbox_ignores_case(routed: AlertSettings) -> None:
    """An inbox route matches whatever the case of the inbox's name."""
    assert routed.recipients("error", "Metals", None) == (METALS_LEAD,)


def test_route_by_instrument_ignores_case(routed: AlertSettings) -> None:
    """An instrument route matches the instrument name in any case."""
    assert routed.recipients("fail", "organics", "bwl-icpms-2") == (ICP_TEAM, METALS_LEAD)


def test_route_by_kind(routed: AlertSettings) -> None:
    """A route limited to kinds does not claim an alert of another kind."""
    assert routed.recipients("error", "organics", "BWL-ICPMS-2") == (QC_LEAD,)
    assert routed.recipients("daemon", None, None) == (IT_DESK,)


def test_matching_routes_are_united_without_repeats(routed: AlertSettings) -> None:
    """An alert matching several routes goes to all their addresses, each once, in order."""
    assert routed.recipients("fail", "metals", "BWL-ICPMS-2") == (METALS_LEAD, ICP_TEAM)


def test_no_matching_route_falls_back_to_email_to(routed: AlertSettings) -> None:
    """An alert no route claims goes to email.to."""
    assert routed.recipients("control", "organics", "BWL-LC-1") == (QC_LEAD,)


def test_route_needs_every_condition(routed: AlertSettings) -> None:
    """A route with an instrument and kinds does not match a different instrument."""
    assert routed.recipients("fail", "organics", "BWL-ICPMS-3") == (QC_LEAD,)


# --------------------------------------------------------------------------- password


def test_password_from_named_environment_variable(monkeypatch: pytest.MonkeyPatch) -> None:
    """With password_env the password is read from that variable."""
    monkeypatch.setenv("BWL_SMTP_PASSWORD", SECRET)
    email = EmailSettings(username="calwarden", password_env="BWL_SMTP_PASSWORD")
    assert email.password() == SECRET


def test_password_from_default_environment_variable(monkeypatch: pytest.MonkeyPatch) -> None:
    """With a username and no password setting, CALWARDEN_SMTP_PASSWORD is read."""
    monkeypatch.setenv("CALWARDEN_SMTP_PASSWORD", SECRET)
    assert EmailSettings(username="calwarden").password() == SECRET


def test_password_unset_variable_raises_key_error(monkeypatch: pytest.MonkeyPatch) -> None:
    """A login whose password variable is unset raises KeyError when the password is read."""
    monkeypatch.delenv("BWL_SMTP_PASSWORD", raising=False)
    email = EmailSettings(username="calwarden", password_env="BWL_SMTP_PASSWORD")
    with pytest.raises(KeyError):
        email.password()


def test_password_from_file_first_line(tmp_path: Path) -> None:
    """With password_file the password is the file's first line, without its newline."""
    path = tmp_path / "smtp-password.txt"
    path.write_text(f"{SECRET}\nsecond line\n", encoding="utf-8")
    assert EmailSettings(username="calwarden", password_file=path).password() == SECRET


def test_password_from_empty_file_is_empty(tmp_path: Path) -> None:
    """An empty password file gives an empty password."""
    path = tmp_path / "smtp-password.txt"
    path.write_text("", encoding="utf-8")
    assert EmailSettings(username="calwarden", password_file=path).password() == ""


def test_no_username_no_password(monkeypatch: pytest.MonkeyPatch) -> None:
    """Without a username there is no password, even when the variable is set."""
    monkeypatch.setenv("CALWARDEN_SMTP_PASSWORD", SECRET)
    assert EmailSettings().password() is None


def test_password_is_never_stored(monkeypatch: pytest.MonkeyPatch, tmp_path: Path) -> None:
    """The password read appears nowhere in the settings' dump."""
    monkeypatch.setenv("BWL_SMTP_PASSWORD", SECRET)
    alerts = _alerts(
        {
            "email": {
                "host": "smtp.brindlewick.example",
                "to": [QC_LEAD],
                "username": "calwarden",
                "password_env": "BWL_SMTP_PASSWORD",
            }
        }
    )
    assert alerts.email.password() == SECRET
    assert SECRET not in json.dumps(alerts.model_dump(mode="json"))
    assert SECRET not in alerts.model_dump_json()


def test_yaml_cannot_carry_a_password() -> None:
    """A password written into the YAML is refused, pointing at password_env and password_file."""
    message = _refusal({"email": {"username": "calwarden", "password": SECRET}})
    assert message.startswith(
        "test.yaml: alerts.email: the password never goes in the configuration"
    )
    assert "password_env" in message and "password_file" in message


def test_refused_password_is_not_echoed() -> None:
    """The refusal of a password in the YAML does not repeat the password."""
    assert SECRET not in _refusal({"email": {"username": "calwarden", "password": SECRET}})


def test_password_is_not_a_settings_field() -> None:
    """The e-mail settings have no password field at all: it cannot be stored."""
    assert "password" not in EmailSettings.model_fields


# --------------------------------------------------------------------------- loading a file


def test_load_config_reads_the_alerts_section(tmp_path: Path) -> None:
    """An alerts section in a YAML file is loaded with its values."""
    path = tmp_path / "lab.yaml"
    path.write_text(
        "alerts:\n"
        "  kinds: [fail, error]\n"
        "  email:\n"
        "    host: smtp.brindlewick.example\n"
        "    security: ssl\n"
        f"    to: [{QC_LEAD}]\n"
        "  throttle: {max_messages: 2, window_minutes: 1}\n"
        "  daily_summary: {enabled: true, at: '06:30'}\n",
        encoding="utf-8",
    )
    alerts = load_config(path).alerts
    assert alerts.kinds == ("fail", "error")
    assert (alerts.email.host, alerts.email.effective_port) == ("smtp.brindlewick.example", 465)
    assert alerts.email.to == (QC_LEAD,)
    assert (alerts.throttle.max_messages, alerts.throttle.window_minutes) == (2, 1.0)
    assert (alerts.daily_summary.enabled, alerts.daily_summary.at) == (True, "06:30")


def test_load_config_names_the_file_in_a_refusal(tmp_path: Path) -> None:
    """A bad alerts section in a file is refused with the file's name and the key."""
    path = tmp_path / "lab.yaml"
    path.write_text("alerts:\n  webhook:\n    url: ftp://hooks.example.org/x\n", encoding="utf-8")
    with pytest.raises(ConfigError, match=r"lab\.yaml: alerts\.webhook\.url: "):
        load_config(path)


def test_password_file_is_relative_to_the_configuration(tmp_path: Path) -> None:
    """A relative password_file is found next to the configuration file in the watch plan."""
    folder = tmp_path / "etc"
    folder.mkdir()
    (folder / "smtp-password.txt").write_text(f"{SECRET}\n", encoding="utf-8")
    (tmp_path / "inbox").mkdir()
    path = folder / "lab.yaml"
    path.write_text(
        "alerts:\n  email:\n    username: calwarden\n    password_file: smtp-password.txt\n",
        encoding="utf-8",
    )
    plan = plan_watch(
        load_config(path), config_dir=folder, inbox=tmp_path / "inbox", out=tmp_path / "out"
    )
    assert plan.alerts.email.password_file == folder / "smtp-password.txt"
    assert plan.alerts.email.password() == SECRET


# --------------------------------------------------------------------------- schema


def test_config_schema_includes_the_alerts_section(capsys: pytest.CaptureFixture[str]) -> None:
    """`calwarden config schema` prints a JSON Schema with the alerts section and its e-mail."""
    assert main(["config", "schema"]) == 0
    schema = json.loads(capsys.readouterr().out)
    assert "alerts" in schema["properties"]
    email = schema["$defs"]["EmailSettings"]["properties"]
    assert {"host", "security", "password_env", "password_file", "to"} <= set(email)
    assert "password" not in email
