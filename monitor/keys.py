"""Every config, profile, rule and alert key declared once: type, default, check and one-line doc.

A :class:`~monitor.keyschema.Section` is one TOML table (``[watch]``, ``[profiles.<name>]``, a rule file …)
and lists its keys; :func:`~monitor.keyschema.read` validates a table against it, so validation, defaults and
``~`` expansion of every path key come from here, and ``monitor.keysdoc`` renders README's key reference from
:data:`SECTIONS`. What one key cannot judge alone (two keys together, a path against another) stays in the
module that owns the section: ``daemon/config``, ``alerts/settings``, ``ingest/profile``, ``rulebook``.
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

from monitor.keyschema import (
    EMPTY,
    REQUIRED,
    TYPES,
    Derived,
    Invalid,
    Key,
    OneOf,
    Range,
    Required,
    Section,
    Text,
    Texts,
    convert,
    read,
)
from monitor.units import ALLOWED as ALLOWED_UNITS
from monitor.units import canonical_unit

__all__ = [
    "ALERTS",
    "ALERTS_COMMAND",
    "ALERTS_DIGEST",
    "ALERTS_EMAIL",
    "ALERTS_EMAIL_ROUTE",
    "ALERTS_LOG",
    "CANONICAL_COLUMNS",
    "CONFIG",
    "DEFAULT_IGNORE",
    "DEFAULT_INCLUDE",
    "DELIMITERS",
    "DRIFT",
    "EMPTY",
    "NORMALITY",
    "PROFILE",
    "REQUIRED",
    "RULE",
    "SECTIONS",
    "STATE",
    "TYPES",
    "WATCH",
    "Derived",
    "Invalid",
    "Key",
    "OneOf",
    "Range",
    "Required",
    "Section",
    "Text",
    "Texts",
    "convert",
    "path_keys",
    "read",
]


# ------------------------------------------------------------------------------------ checks of one value
def _unit(v: str) -> str:
    u = canonical_unit(v)
    if u is None:
        raise Invalid(f"must be one of {ALLOWED_UNITS}")
    return u


DELIMITERS = {",": ",", ";": ";", "\t": "\t", "tab": "\t", "auto": "auto"}
CANONICAL_COLUMNS = ("lot", "value", "timestamp", "product", "line", "head", "unit", "n", "mean", "sd")


def _delimiter(v: str) -> str:
    if v not in DELIMITERS:
        raise Invalid("must be one of ',', ';', '\\t' (or \"tab\"), 'auto'")
    return DELIMITERS[v]


def _decimal(v: str) -> str:
    if v not in (".", ","):
        raise Invalid("must be '.' or ','")
    return v


def _encoding(v: str) -> str:
    import codecs

    low = v.strip().lower()
    if not low:
        raise Invalid("must be a non-empty string")
    if low == "auto":
        return "auto"
    if low in ("latin-1", "latin1", "iso-8859-1", "iso8859-1"):
        return "latin-1"
    if low in ("cp1252", "windows-1252"):
        return "cp1252"
    try:
        info = codecs.lookup(low)
    except LookupError:
        raise Invalid("not a known text encoding",
                      hint='use "auto", "latin-1", "cp1252" or a Python codec name such as "utf-16"') from None
    if not getattr(info, "_is_text_encoding", True):   # a private flag of the stdlib's CodecInfo
        raise Invalid("not a text encoding")
    return info.name


def _columns(cols: Mapping[str, Any]) -> tuple[tuple[str, str], ...]:
    pairs: list[tuple[str, str]] = []
    for k, v in cols.items():
        if k not in CANONICAL_COLUMNS:
            raise Invalid(f"unknown column name {k!r}", sub=k, whole=True,
                          hint="allowed: " + ", ".join(CANONICAL_COLUMNS))
        if not isinstance(v, str) or not v.strip():
            raise Invalid(f"columns.{k} = {v!r} — must be the export's header text", sub=k, whole=True)
        pairs.append((k, v.strip()))
    seen: dict[str, str] = {}
    for k, v in pairs:
        if v.casefold() in seen:
            raise Invalid(f"columns.{k} and columns.{seen[v.casefold()]} both name {v!r}", sub=k, whole=True,
                          hint="each canonical column needs its own header")
        seen[v.casefold()] = k
    return tuple(pairs)


def _bad_rows(v: Any) -> float:
    ok = not isinstance(v, bool) and ((isinstance(v, int) and v >= 0) or (isinstance(v, float) and 0 <= v < 1))
    if not ok:
        raise Invalid("must be a whole number >= 0 or a fraction in [0, 1)")
    return float(v)


def _end_of_lot(v: str) -> str:
    if v == "":
        raise Invalid("must be a non-empty string")
    if not v.strip():
        raise Invalid("end_of_lot must not be blank", whole=True)
    return v.strip()


def _marker_suffix(v: str) -> str:
    if v == "":
        raise Invalid("must be a non-empty string")
    if "/" in v or "\\" in v or "\x00" in v:
        raise Invalid("must not contain path separators")
    return v


def _strptime_format(v: str) -> str:
    if v == "":
        raise Invalid("must be a non-empty string")
    if "%" not in v:
        raise Invalid('must be a strptime format such as "%d.%m.%Y %H:%M:%S"')
    return v


def _addresses(v: Any) -> tuple[str, ...]:
    import re

    if isinstance(v, str):
        v = [v]
    if not isinstance(v, (list, tuple)) or not v:
        raise Invalid("must be an address or a non-empty list")
    for a in v:
        if not isinstance(a, str) or not re.match(ADDRESS, a):
            raise Invalid(f"{a!r} is not a plain e-mail address", whole=True,
                          hint="write name@example.com only (no display name, no spaces or line breaks)")
    return tuple(v)


def _zone(v: str) -> str:
    from zoneinfo import ZoneInfo, ZoneInfoNotFoundError

    try:
        ZoneInfo(v)
    except (ZoneInfoNotFoundError, ValueError, TypeError):
        raise Invalid("not a known IANA time zone", hint='e.g. "Europe/Berlin" or "UTC"') from None
    return v


def _inspections() -> tuple[str, ...]:
    from monitor.quantity import INSPECTIONS
    return tuple(INSPECTIONS)


def _sampling_plans() -> tuple[str, ...]:
    from monitor.quantity import SAMPLING_PLANS
    return tuple(SAMPLING_PLANS)


ADDRESS = r"^[A-Za-z0-9.!#$%&'*+/=?^_`{|}~-]+@[A-Za-z0-9](?:[A-Za-z0-9.-]*[A-Za-z0-9])?$"
NON_NEGATIVE, POSITIVE = Range(0.0), Range(0.0, lo_open=True)
PLAIN = Text(solid=True, plain=True)
DEFAULT_INCLUDE = ("*.csv", "*.txt", "*.tsv")
DEFAULT_IGNORE = (".*", "*.tmp", "*.part", "~*", "*.swp", "*.reason.txt")
_PATTERNS = Texts('a list of file-name patterns such as "*.csv"', solid=True, strip=True, forbid="/",
                  hint="patterns match the bare file name, no '/'")
_GLOBS = Texts("a non-empty list of names or globs", at_least_one=True)

# ------------------------------------------------------------------------------------ the daemon config
CONFIG = Section("config", "Daemon config (`config/lotwarden.toml`), top level", (
    Key("rules_dir", "string", REQUIRED, None, "folder of rule files (*.toml), relative to this config file (required)",
        path=True),
    Key("watch", "table", REQUIRED, None, "[watch]: the drop folder and how finished files are recognised"),
    Key("state", "table", REQUIRED, None, "[state]: the state database, the archive and the quarantine"),
    Key("alerts", "table", EMPTY, None, "[alerts]: alert channels and e-mail pacing"),
    Key("profiles", "table", EMPTY, None, "[profiles.<name>] tables: how one weigher's exports are read; first "
                                       "matching profile wins"),
    Key("timezone", "string", Derived("<alerts.digest.timezone>, else UTC"), _zone,
        'IANA time zone of the plant, e.g. "Europe/Berlin": a date given to `lots`, `report` (--since / '
        "--until) means that whole day there; times are shown there"),
    Key("plant", "string", Derived("<the config file's folder name>"), Text(solid=True, plain=True, strip=True),
        'the plant\'s name as people know it (e.g. "Brackenfield Foods, hall 2"): the title of `report` pages'),
))
WATCH = Section("watch", "`[watch]`", (
    Key("folder", "string", REQUIRED, None, "drop folder the checkweigher writes its exports into (required)",
        path=True),
    Key("settle_seconds", "number", 5.0, NON_NEGATIVE,
        "a file counts as finished when size and mtime stay unchanged this long (>= 0)"),
    Key("polling", "bool", False, None, "true: poll the folder (network shares) instead of native file events"),
    Key("poll_interval", "number", 2.0, POSITIVE, "seconds between looks of the polling observer (> 0)"),
    Key("rescan_seconds", "number", 60.0, POSITIVE, "seconds between full rescans that catch dropped events (> 0)"),
    Key("include", "strings", DEFAULT_INCLUDE, _PATTERNS,
        "file-name patterns taken from the drop folder (list of globs)"),
    Key("ignore", "strings", DEFAULT_IGNORE, _PATTERNS,
        "file-name patterns never taken, checked before include (list of globs); hidden, temporary, marker and "
        "reason files are never taken anyway"),
), prefix="watch.")
STATE = Section("state", "`[state]`", (
    Key("folder", "string", REQUIRED, None,
        "folder of the state database lotwarden.db (required; local disk, not a share)", path=True),
    Key("archive", "string", Derived("<state.folder>/archive"), None,
        "where processed files move, in dated subfolders YYYY-MM-DD", path=True),
    Key("quarantine", "string", Derived("<state.folder>/quarantine"), None,
        "where rejected files move, with <name>.reason.txt", path=True),
), prefix="state.")

# ------------------------------------------------------------------------------------ feed profiles
PROFILE = Section("profiles.<name>", "`[profiles.<name>]` (feed profiles)", (
    Key("match", "strings", (), Texts(),
        "file-name glob patterns (fnmatch on the name only) that select this profile"),
    Key("delimiter", "string", "auto", _delimiter,
        'field separator: "," ";" "\\t" or "auto" (sniffed from the header line)'),
    Key("decimal", "string", ".", _decimal, 'decimal mark of numbers: "." or ","'),
    Key("encoding", "string", "auto", _encoding,
        'text encoding: "auto" (UTF-8 with/without BOM, UTF-16 by BOM), "latin-1"/"cp1252" '
        "(used when the file is not UTF-8), or any other Python codec name"),
    Key("skip_lines", "integer", 0, Range(0, whole=True), "lines before the header to skip (whole number >= 0)"),
    Key("header_prefix", "string", "", Text(),
        "the header is the first line (after skip_lines) starting with this text"),
    Key("columns", "table", (), _columns,
        "table mapping canonical names (" + ", ".join(CANONICAL_COLUMNS) + ") to the export's headers"),
    Key("unit", "string", None, _unit,
        f"unit of the values when the file has no unit column (or a blank unit cell): {ALLOWED_UNITS}; "
        "default none: values carry no unit, are taken to be in the judging rule's unit, and each lot says so"),
    Key("tare", "number", 0.0, NON_NEGATIVE,
        "subtracted from every value (gross -> net), in `unit` (converted to each row's unit), or as it stands "
        "when no unit is declared (finite number >= 0)"),
    Key("density", "number", None, Range(0.0, lo_open=True),
        "product density in g/mL, for converting weighed mass to a volume unit later (> 0)"),
    Key("drop_values", "strings", (), Texts(strip=True),
        'raw values meaning "no measurement" (e.g. ["-9999", "ERR"]): dropped and counted'),
    Key("max_bad_rows", "count or share", 0.05, _bad_rows,
        "bad rows tolerated: a whole number, or a fraction in [0, 1) of the data rows"),
    Key("end_of_lot", "string", None, _end_of_lot, 'raw text in the lot column marking the end of a lot (e.g. "END")'),
    Key("marker_suffix", "string", None, _marker_suffix,
        'the file is taken only once "<name><suffix>" exists (e.g. ".done")'),
    Key("timestamp_format", "string", None, _strptime_format,
        "strptime format of the timestamp column (default: ISO 8601, then inference)"),
), prefix="profiles.<name>.")

# ------------------------------------------------------------------------------------ alerts
ALERTS = Section("alerts", "`[alerts]`", (
    Key("templates", "string", None, None,
        "folder of operator templates; a file there with a shipped template's name wins", path=True),
    Key("group_window_seconds", "number", 60.0, NON_NEGATIVE,
        "e-mail: alerts to the same recipients within this many seconds go in one message"),
    Key("group_max", "integer", 50, Range(1, whole=True),
        "e-mail: at most this many alerts listed in one message (integer >= 1)"),
    Key("hourly_cap", "integer", 12, Range(1, whole=True),
        "e-mail: at most this many messages per recipient per rolling hour; the rest are folded into one "
        "summary when a slot frees (integer >= 1)"),
    Key("reminder_minutes", "number", 240.0, NON_NEGATIVE,
        "minutes: a hold or review with no disposition yet is told again (a `reminder` alert) every this long "
        "until `lotwarden dispose` records one (0: no reminders); e-mail: a repeat hold notice of a lot told "
        "within this long is not sent again"),
    Key("drain_seconds", "number", 5.0, POSITIVE, "how often the outbox is drained (seconds, > 0)"),
    Key("log", "table", None, None, "[alerts.log]: the JSON-lines alert log"),
    Key("email", "table", None, None, "[alerts.email]: SMTP delivery"),
    Key("command", "table", None, None, "[alerts.command]: a program run once per alert"),
    Key("digest", "table", None, None, "[alerts.digest]: the daily summary's schedule"),
), prefix="alerts.")
ALERTS_LOG = Section("alerts.log", "`[alerts.log]`", (
    Key("path", "string", REQUIRED, None,
        "JSON-lines file, one Alert.to_json() object per line, fsynced per write (required)", path=True),
    Key("retry_max_seconds", "number", 60.0, POSITIVE, "cap of the retry backoff when the file cannot be written"),
), prefix="alerts.log.")
ALERTS_EMAIL = Section("alerts.email", "`[alerts.email]`", (
    Key("host", "string", REQUIRED, PLAIN, "SMTP server host name (required)"),
    Key("port", "integer", 25, Range(1, 65535, whole=True), "SMTP server port (465 when security = \"tls\")"),
    Key("security", "string", "none", OneOf(("none", "starttls", "tls")),
        'transport security: "none", "starttls" or "tls" (implicit TLS)'),
    Key("sender", "string", REQUIRED, PLAIN, "From address (required)"),
    Key("recipients", "strings", REQUIRED, _addresses, "default recipient address or list of addresses (required)"),
    Key("username", "string", None, PLAIN, "login name; needs password_env or password_file"),
    Key("password_env", "string", None, PLAIN, "name of the environment variable holding the login password"),
    Key("password_file", "string", None, None, "file holding the login password (first line; keep it mode 0600)",
        path=True),
    Key("ca_file", "string", None, None,
        "PEM file of CA certificates to trust for starttls/tls (default: system store)", path=True),
    Key("timeout", "number", 20.0, POSITIVE, "seconds to wait for the server on connect and each command (> 0)"),
    Key("deadline_seconds", "number", 60.0, POSITIVE,
        "overall deadline of one SMTP exchange (connect, banner, EHLO, STARTTLS, AUTH and one message), seconds "
        "(> 0): a server answering a byte at a time is cut off and retried later"),
    Key("retry_first_seconds", "number", 2.0, POSITIVE,
        "first retry delay after a connection error or 4xx reply (> 0)"),
    Key("retry_max_seconds", "number", 60.0, POSITIVE, "cap of the jittered exponential retry delay (> 0)"),
    Key("route", "tables", (), None,
        "[[alerts.email.route]] tables: lines / products (globs) / kinds select alerts; a route's recipients "
        "receive them in addition to `recipients` (or instead, with replace_default)"),
), prefix="alerts.email.")
ALERTS_EMAIL_ROUTE = Section("alerts.email.route", "`[[alerts.email.route]]` (e-mail routes)", (
    Key("lines", "strings", ("*",), _GLOBS, "line names this route selects (glob patterns allowed)"),
    Key("products", "strings", ("*",), _GLOBS, "product codes this route selects (glob patterns allowed)"),
    Key("kinds", "strings", ("*",), _GLOBS,
        "alert kinds this route selects; a verdict-changed, disposition or reminder alert is also selected by the "
        "kind of the verdict it is about (hold, review), so it reaches the people who got the hold"),
    Key("recipients", "strings", REQUIRED, _addresses, "addresses that receive the selected alerts (required)"),
    Key("replace_default", "bool", False, None,
        "true: the selected alerts go to this route's recipients instead of the default `recipients`; false: in "
        "addition to them"),
), prefix="alerts.email.route.")
ALERTS_COMMAND = Section("alerts.command", "`[alerts.command]`", (
    Key("argv", "strings", REQUIRED,
        Texts("a non-empty list of non-empty strings", at_least_one=True, forbid="\0", single=False,
              hint='e.g. argv = ["/usr/local/bin/page-qa", "--line-alert"]; no shell is used'),
        "program and arguments (list of strings, no shell); the alert JSON arrives on stdin (required)"),
    Key("timeout", "number", 30.0, POSITIVE, "seconds before the command is killed and retried (> 0)"),
    Key("retry_first_seconds", "number", 2.0, POSITIVE, "first retry delay after a timeout or exit code 75 (> 0)"),
    Key("retry_max_seconds", "number", 60.0, POSITIVE, "cap of the retry delay (> 0)"),
), prefix="alerts.command.")
ALERTS_DIGEST = Section("alerts.digest", "`[alerts.digest]`", (
    Key("cron", "string", "0 6 * * *", None,
        "when the daily digest is sent: five-field crontab (minute hour day month weekday)"),
    Key("timezone", "string", "UTC", _zone, 'IANA time zone of `cron`, e.g. "Europe/Berlin"'),
    Key("catch_up_hours", "number", 12.0, NON_NEGATIVE,
        "a digest missed while the daemon was down is sent at start if at most this late"),
), prefix="alerts.digest.")

# ------------------------------------------------------------------------------------ rule files
RULE = Section("rule", "Rule files (`rules/*.toml`)", (
    Key("name", "string", REQUIRED, Text(solid=True, strip=True), "rule name shown in verdicts and alerts (required)"),
    Key("products", "strings", ("*",),
        Texts("a non-empty list of product codes", at_least_one=True, solid=True, strip=True),
        'product codes this rule judges; "*" matches any (glob patterns allowed)'),
    Key("target", "number", REQUIRED, None, "target mean fill in `unit` (required)"),
    Key("unit", "string", REQUIRED, _unit, f"unit of target and values after conversion: {ALLOWED_UNITS} (required)"),
    Key("alternative", "string", "two-sided", OneOf(("two-sided", "less", "greater")),
        "two-sided (off target either way), less (low fill), greater (giveaway)"),
    Key("alpha", "number", 0.05, Range(0.0, 0.5, lo_open=True), "significance level of the test, in (0, 0.5]"),
    Key("release", "string", "no-shift-shown", OneOf(("no-shift-shown", "equivalence")),
        '"no-shift-shown": a lot passes unless its test shows it off target | "equivalence": it passes only when '
        "two one-sided tests show its mean within target ± margin at alpha (needs margin); otherwise review"),
    Key("margin", "number", None, POSITIVE,
        'half-width of the equivalence range around target, in `unit` (> 0); only with release = "equivalence"'),
    Key("min_n", "integer", 5, Range(2, whole=True),
        "smallest lot the test may judge; smaller lots get `review` (integer >= 2)"),
    Key("known_sd", "number", None, POSITIVE,
        "known process standard deviation in `unit`: switches to the z-test (> 0)"),
    Key("shift_of_interest", "number", None, POSITIVE, "mean shift (in `unit`, > 0) whose detection power is reported"),
    Key("target_power", "number", 0.8, Range(0.0, 1.0, lo_open=True, hi_open=True),
        "power the reported sample-size-for-power aims at, in (0, 1)"),
    Key("idle_minutes", "number", 30.0, POSITIVE,
        "daemon: a lot with no new values for this long is closed and judged (> 0)"),
    Key("nominal", "number", None, POSITIVE,
        "nominal quantity on the label, in `unit` (any unit: `kg` = 1 is 1000 g; 5 g/mL to 25 kg/L after "
        "conversion): adds the average-quantity screen (TNE, T1/T2 packs, mean); a failed screen holds the lot, "
        "an undecided one sends it to review; a screen, not a legal verdict"),
    Key("inspection", "string", "full", OneOf(_inspections),
        '"full": every pack of the lot is in the export (packers\' rules: mean >= nominal, at most `t1_share` '
        'below T1, none below T2) | "sample": the export is a sample of a batch of `batch_size` packs (reference '
        'test, SI 2006/659 Sch. 2); needs `nominal`'),
    Key("batch_size", "integer", None, Range(1, whole=True),
        'packs in the batch the sample was drawn from (whole number >= 1); required for inspection = "sample", '
        "which picks the published plan by it"),
    Key("sampling_plan", "string", "single", OneOf(_sampling_plans),
        'plan for inspection = "sample": "single" (SI 2006/659 Sch. 2 ¶3.3) | "double" (¶3.7 ff., Directive '
        '76/211/EEC Annex II 2.2.1) | "destructive" (20 packs, batches >= 100; Annex II 2.2.2)'),
    Key("t1_share", "number", 0.025, Range(0.0, 0.025),
        'inspection = "full": share of packs allowed below T1 (nominal - TNE), in [0, 0.025]; 0.025 is the UK '
        "2.5 % (trading standards guidance on SI 2006/659); Germany's Fertigpackungsverordnung §9(3) allows "
        "2 % (0.02)"),
    Key("description", "string", "", Text(non_empty=False), "free text for people"),
    Key("cost_per_unit", "number", None, Range(0.0),
        "cost of one `unit` of product (e.g. 0.0042 per g), for the giveaway's cost (finite number >= 0)"),
    Key("currency", "string", None, Text(solid=True, plain=True, strip=True),
        'currency of `cost_per_unit`, shown beside costs (text, e.g. "EUR"); needs cost_per_unit'),
    Key("normality", "table", EMPTY, None, "[normality]: the normality gate (keys below)"),
    Key("drift", "table", None, None,
        "[drift]: watch the lots' location statistics across lots for a creeping mean (keys below); "
        "no table: no drift watch"),
))
NORMALITY = Section("normality", "Rule files, `[normality]` table", (
    Key("test", "string", "shapiro", OneOf(("shapiro",)), 'normality test: "shapiro" (Shapiro–Wilk)'),
    Key("alpha", "number", 0.05, Range(0.0, 0.5, lo_open=True),
        "normality is rejected when its p-value is below this, in (0, 0.5]"),
    Key("on_fail", "string", "review", OneOf(("review", "wilcoxon", "ignore")),
        'what a failed gate does: "review" | "wilcoxon" | "ignore"'),
    Key("on_unassessed", "string", "proceed", OneOf(("proceed", "review")),
        'lots known only by n/mean/sd: "proceed" with the t-test or "review"'),
), prefix="normality.")
DRIFT = Section("drift", "Rule files, `[drift]` table (drift across lots)", (
    Key("method", "string", "cusum", OneOf(("cusum", "ewma")),
        '"cusum": tabular two-sided CUSUM (keys k, h) | "ewma": EWMA chart (keys lambda, L); each closed lot '
        "adds its t (or z) against target, per line and product, in the order lots close"),
    Key("k", "number", 0.5, Range(0.0), "CUSUM allowance (slack) per lot, in units of the lot statistic (>= 0)"),
    Key("h", "number", 5.0, POSITIVE, "CUSUM decision limit: a signal when S+ or S- exceeds it (> 0)"),
    Key("lambda", "number", 0.2, Range(0.0, 1.0, lo_open=True), "EWMA weight of the newest lot, in (0, 1]"),
    Key("L", "number", 3.0, POSITIVE, "EWMA limit width in standard deviations of the EWMA statistic (> 0)"),
    Key("heads", "bool", False, None,
        "true: the same watch per filler head across lots (the head's t against target), when exports name heads"),
), prefix="drift.")

SECTIONS: tuple[Section, ...] = (CONFIG, WATCH, STATE, PROFILE, ALERTS, ALERTS_LOG, ALERTS_EMAIL,
                                 ALERTS_EMAIL_ROUTE, ALERTS_COMMAND, ALERTS_DIGEST, RULE, NORMALITY, DRIFT)


def path_keys() -> list[tuple[Section, Key]]:
    """Every key that names a file or folder, with its section."""
    return [(s, k) for s in SECTIONS for k in s.keys if k.path]
