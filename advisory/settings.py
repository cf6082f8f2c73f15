"""Settings: database URL, data folder, mail and webhook settings.

Resolution order for each value: command-line option, environment variable,
optional settings file (TOML), built-in default.

Environment variables
---------------------
``ADVISORY_DB``
    SQLAlchemy URL of the database (default: an SQLite file in the data folder).
``ADVISORY_HOME``
    The data folder (default: ``$XDG_DATA_HOME/advisory`` or ``~/.local/share/advisory``).
``ADVISORY_SETTINGS``
    Path of a TOML settings file (default: ``<data folder>/settings.toml`` if present).
``ADVISORY_SMTP_HOST``, ``ADVISORY_SMTP_PORT``, ``ADVISORY_SMTP_USER``, ``ADVISORY_SMTP_PASSWORD``,
``ADVISORY_SMTP_FROM``, ``ADVISORY_SMTP_TLS``
    Outgoing mail.  ``ADVISORY_SMTP_TLS`` (settings file: ``[smtp] tls``) is
    ``starttls`` (default; port 587 unless set), ``implicit`` (TLS from the
    first byte, port 465) or ``none`` (a plain local relay, port 25).  The older
    ``ADVISORY_SMTP_STARTTLS=false`` means ``none``.  The password is read only
    from the environment or the settings file; it is never stored in the
    database nor logged.
``ADVISORY_WEBHOOK_SECRET``
    Key for the HMAC signature on webhook deliveries.
``ADVISORY_OUTBOX``
    Folder where every notice is written as a file (default: ``<data folder>/outbox``).
``ADVISORY_OUTBOX_FORMATS``
    Comma-separated formats written to the outbox for each block notice, from
    ``text``, ``markdown``, ``html``, ``json`` and ``sms`` (the short form of at
    most 160 characters, as ``.sms.txt``); default ``text,markdown,html,json``
    (settings file: ``[outbox] formats = [...]``).  Farm summaries always get
    the four full formats.  For thousands of blocks a lean outbox such as
    ``json`` (the notice as data, its short text included) or ``json,sms``
    keeps the nightly run fast; what goes out by e-mail, webhook or text message
    is not affected.
``ADVISORY_OUTBOX_CHARTS``
    When a block notice's chart (PNG, with the HTML page that shows it) is drawn
    into the outbox: ``auto`` (default: when the notice is at "stand by" or
    worse, or goes out by e-mail), ``email`` (only when it goes out by e-mail),
    ``always`` or ``never`` (settings file: ``[outbox] charts = "..."``).  A chart
    takes a few tenths of a second to draw; e-mails always carry theirs.
``ADVISORY_WORKERS``
    Processes that share the forecasting and composing of a run with at least
    :data:`advisory.pipeline.PARALLEL_FROM_BLOCKS` blocks: ``auto`` (default: one
    per processor, at most 4) or a number; ``1`` keeps every run in one process
    (settings file: ``[run] workers = ...``).  The extra processes only read the
    database; the run's own process stores and delivers everything.
"""

from __future__ import annotations

import os
import tomllib
from dataclasses import dataclass, field
from pathlib import Path

from advisory.errors import InputError

#: Formats the outbox can hold for a notice (see :mod:`advisory.notices.render`).
OUTBOX_FORMAT_CHOICES = ("text", "markdown", "html", "json", "sms")
#: The outbox's formats unless set otherwise (every notice in full).
OUTBOX_DEFAULT_FORMATS = ("text", "markdown", "html", "json")
#: When charts go into the outbox (see ``ADVISORY_OUTBOX_CHARTS``).
OUTBOX_CHART_CHOICES = ("auto", "email", "always", "never")
#: How mail goes to the SMTP server (see ``ADVISORY_SMTP_TLS``) and the port of each unless set.
SMTP_TLS_PORTS = {"starttls": 587, "implicit": 465, "none": 25}


def data_home() -> Path:
    """The data folder: ``ADVISORY_HOME``, else the XDG data folder."""
    if os.environ.get("ADVISORY_HOME"):
        return Path(os.environ["ADVISORY_HOME"]).expanduser()
    xdg = os.environ.get("XDG_DATA_HOME") or str(Path.home() / ".local" / "share")
    return Path(xdg) / "advisory"


def default_db_url() -> str:
    return f"sqlite:///{data_home() / 'advisory.sqlite'}"


def _settings_file() -> Path | None:
    env = os.environ.get("ADVISORY_SETTINGS")
    if env:
        p = Path(env).expanduser()
        if not p.exists():
            raise InputError("settings file not found", file=str(p))
        return p
    p = data_home() / "settings.toml"
    return p if p.exists() else None


def _load_file() -> dict:
    p = _settings_file()
    if p is None:
        return {}
    try:
        with open(p, "rb") as fh:
            return tomllib.load(fh)
    except tomllib.TOMLDecodeError as exc:
        raise InputError(f"not valid TOML: {exc}", file=str(p)) from None


@dataclass(frozen=True)
class SmtpSettings:
    host: str | None = None
    port: int = 587
    user: str | None = None
    password: str | None = field(default=None, repr=False)
    sender: str = "advisory@localhost"
    starttls: bool = True
    #: "starttls", "implicit" or "none"; None: from ``starttls`` ("starttls" or "none").
    tls: str | None = None

    @property
    def tls_mode(self) -> str:
        """How the connection is secured: "starttls", "implicit" or "none"."""
        return self.tls or ("starttls" if self.starttls else "none")


@dataclass(frozen=True)
class Settings:
    db_url: str
    data_home: Path
    outbox: Path
    smtp: SmtpSettings
    webhook_secret: str | None = field(default=None, repr=False)
    #: Formats written to the outbox for each block notice (farm summaries: all).
    outbox_formats: tuple[str, ...] = OUTBOX_DEFAULT_FORMATS
    #: "auto", "email", "always" or "never": when a block notice's chart goes into the outbox.
    outbox_charts: str = "auto"
    #: Processes that share a large run's forecasting and composing ("auto": one per
    #: processor this process may use, at most 4; 1: never more than this process).
    workers: int = 1


def _workers(env_value, file_value) -> int:
    where = "ADVISORY_WORKERS" if env_value else "[run] workers"
    raw = str(env_value or file_value or "auto").strip().lower()
    if raw == "auto":
        try:
            cpus = len(os.sched_getaffinity(0))
        except (AttributeError, OSError):
            cpus = os.cpu_count() or 1
        return max(1, min(4, cpus))
    try:
        n = int(raw)
    except ValueError:
        n = 0
    if not 1 <= n <= 64:
        raise InputError(f"{where}: {raw!r} is not 'auto' or a number of processes from 1 to 64", field=where)
    return n


def _truthy(v) -> bool:
    return str(v).strip().lower() in {"1", "true", "yes", "on"}


def _smtp_tls(env_value, file_value, starttls_value) -> str:
    """``ADVISORY_SMTP_TLS`` / ``[smtp] tls``, else the older STARTTLS switch (false: "none")."""
    if env_value or file_value:
        where = "ADVISORY_SMTP_TLS" if env_value else "[smtp] tls"
        value = str(env_value or file_value).strip().lower()
        if value not in SMTP_TLS_PORTS:
            raise InputError(f"{where}: {value!r} is not one of {', '.join(SMTP_TLS_PORTS)}", field=where)
        return value
    return "starttls" if _truthy(starttls_value) else "none"


def _outbox_formats(env_value, file_value) -> tuple[str, ...]:
    if env_value:
        where, raw = "ADVISORY_OUTBOX_FORMATS", [v.strip() for v in str(env_value).split(",")]
    elif file_value is not None:
        where = "[outbox] formats"
        raw = [v.strip() for v in (file_value.split(",") if isinstance(file_value, str) else file_value)]
    else:
        return OUTBOX_DEFAULT_FORMATS
    formats = tuple(dict.fromkeys(v.lower() for v in raw if v))
    bad = [v for v in formats if v not in OUTBOX_FORMAT_CHOICES]
    if bad or not formats:
        raise InputError(f"{where}: {', '.join(bad) or 'nothing'} is not an outbox format "
                         f"(choose from {', '.join(OUTBOX_FORMAT_CHOICES)})", field=where)
    return formats


def _outbox_charts(env_value, file_value) -> str:
    where = "ADVISORY_OUTBOX_CHARTS" if env_value else "[outbox] charts"
    value = str(env_value or file_value or "auto").strip().lower()
    if value not in OUTBOX_CHART_CHOICES:
        raise InputError(f"{where}: {value!r} is not one of {', '.join(OUTBOX_CHART_CHOICES)}", field=where)
    return value


def load(db_url: str | None = None) -> Settings:
    """Resolve the settings.

    Parameters
    ----------
    db_url : str, optional
        A database URL from the command line; wins over everything else.
    """
    f = _load_file()
    home = data_home()
    mail = f.get("smtp", {})
    env = os.environ
    tls = _smtp_tls(env.get("ADVISORY_SMTP_TLS"), mail.get("tls"),
                    env.get("ADVISORY_SMTP_STARTTLS", mail.get("starttls", True)))
    port_text = env.get("ADVISORY_SMTP_PORT") or mail.get("port") or SMTP_TLS_PORTS[tls]
    try:
        port = int(port_text)
    except (TypeError, ValueError):
        raise InputError(f"{port_text!r} is not a port number", field="ADVISORY_SMTP_PORT") from None
    smtp = SmtpSettings(
        host=env.get("ADVISORY_SMTP_HOST") or mail.get("host"),
        port=port,
        user=env.get("ADVISORY_SMTP_USER") or mail.get("user"),
        password=env.get("ADVISORY_SMTP_PASSWORD") or mail.get("password"),
        sender=env.get("ADVISORY_SMTP_FROM") or mail.get("from", "advisory@localhost"),
        starttls=tls == "starttls",
        tls=tls,
    )
    return Settings(
        db_url=db_url or env.get("ADVISORY_DB") or f.get("database", {}).get("url") or default_db_url(),
        data_home=home,
        outbox=Path(env.get("ADVISORY_OUTBOX") or f.get("outbox", {}).get("path") or home / "outbox"),
        smtp=smtp,
        webhook_secret=env.get("ADVISORY_WEBHOOK_SECRET") or f.get("webhook", {}).get("secret"),
        outbox_formats=_outbox_formats(env.get("ADVISORY_OUTBOX_FORMATS"), f.get("outbox", {}).get("formats")),
        outbox_charts=_outbox_charts(env.get("ADVISORY_OUTBOX_CHARTS"), f.get("outbox", {}).get("charts")),
        workers=_workers(env.get("ADVISORY_WORKERS"), f.get("run", {}).get("workers")),
    )
