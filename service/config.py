"""The node's configuration: one TOML file (stdlib ``tomllib``) validated by pydantic models.

Every value has an embedded default, so the node starts with no file at all.  Errors are raised
as :class:`~service.errors.UserError` naming the key path, the bad value and what is allowed,
e.g. ``routes[2].destinations: unknown destination "PACS2"; defined: PACS_MAIN, ARCHIVE``.

Command-line flags of ``serve`` override the file through :func:`apply_overrides`.
"""

from __future__ import annotations

import hashlib
import ipaddress
import json
import os
import re
import tomllib
import types
import typing
from collections.abc import Iterable, Sequence
from pathlib import Path
from typing import Annotated, Any, Literal

from pydantic import (
    BaseModel,
    ConfigDict,
    Discriminator,
    Field,
    Tag,
    ValidationError,
    field_validator,
)

from service.errors import UserError
from service.grading import IMPLEMENTED_GUIDELINES, NOT_AVAILABLE, RuleSwitches
from service.model import SETTABLE_RHYTHMS, Context, Guideline, Rhythm, SpecialSituation

#: the route that applies to a calling AE with no route of its own
DEFAULT_ROUTE = "*"
DEFAULT_AE_TITLE = "DIASTOLIC_SR"
DEFAULT_PORT = 11112
DEFAULT_DATA_DIR = "diastolic-sr-data"
#: health and metrics endpoint port (an unregistered port; common practice: pick a free one)
DEFAULT_HTTP_PORT = 11180
#: what check-config prints instead of a secret
MASK = "********"

_AE_CHARS = re.compile(r"^[\x20-\x5b\x5d-\x7e]{1,16}$")  # PS3.5 6.2 AE: no backslash, no control
_UID = re.compile(r"^(0|[1-9][0-9]*)(\.(0|[1-9][0-9]*))*$")  # PS3.5 9.1


def check_ae_title(value: str) -> str:
    """An AE title per PS3.5 Table 6.2-1 (AE VR): 1-16 characters, no backslash or control
    characters, not only spaces.  Leading and trailing spaces are not significant."""
    if not isinstance(value, str) or not _AE_CHARS.match(value) or not value.strip():
        raise ValueError(
            "an AE title is 1 to 16 printable characters without backslash, not only spaces"
        )
    return value.strip()


AETitle = Annotated[str, Field(min_length=1)]


class Section(BaseModel):
    model_config = ConfigDict(frozen=True, extra="forbid")


class NodeConfig(Section):
    """The local Application Entity."""

    ae_title: AETitle = DEFAULT_AE_TITLE
    #: address to listen on; "" listens on all interfaces
    bind: str = ""
    #: TCP port; 0 lets the system pick a free one (it is written to ``run/listener.json``)
    port: int = Field(default=DEFAULT_PORT, ge=0, le=65535)
    #: the journal (with the received objects and results); relative paths are taken from the
    #: configuration file's folder
    data_dir: str = DEFAULT_DATA_DIR

    @field_validator("ae_title")
    @classmethod
    def _ae(cls, v: str) -> str:
        return check_ae_title(v)


class LimitsConfig(Section):
    max_associations: int = Field(default=16, ge=8, le=1000)
    #: maximum PDU length we receive, bytes (0 = unlimited)
    max_pdu: int = Field(default=16382, ge=0)
    acse_timeout: float = Field(default=30.0, gt=0)
    dimse_timeout: float = Field(default=60.0, gt=0)
    network_timeout: float = Field(default=60.0, gt=0)
    #: on shutdown, wait this long for open associations to finish before aborting them
    shutdown_grace_seconds: float = Field(default=10.0, ge=0)


class AccessConfig(Section):
    #: calling AE titles allowed to associate; empty allows any
    allowed_calling_aes: list[AETitle] = Field(default_factory=list)
    #: accept image storage SOP classes and discard the objects (so a rule that forwards a
    #: whole study does not fail); SR objects are always kept.  Encapsulated PDF Storage is
    #: accepted either way: the node's own summary is kept as ignored; another PDF is refused
    #: (0x0122) when this is off and discarded when it is on
    accept_images: bool = False
    #: address pinning: calling AE title -> addresses or networks (CIDR) it must come from;
    #: a pinned AE calling from anywhere else is rejected like an unknown AE
    calling_ae_addresses: dict[str, list[str]] = Field(default_factory=dict)

    @field_validator("allowed_calling_aes")
    @classmethod
    def _aes(cls, v: list[str]) -> list[str]:
        return [check_ae_title(x) for x in v]

    @field_validator("calling_ae_addresses")
    @classmethod
    def _pins(cls, v: dict[str, list[str]]) -> dict[str, list[str]]:
        out: dict[str, list[str]] = {}
        for aet, addresses in v.items():
            try:
                name = check_ae_title(aet)
            except ValueError as exc:
                raise ValueError(f'"{aet}": {exc}') from None
            if not addresses:
                raise ValueError(f'"{aet}": give at least one address, e.g. ["10.0.0.5"]')
            for a in addresses:
                try:
                    ipaddress.ip_network(a, strict=False)
                except ValueError:
                    raise ValueError(
                        f'"{aet}": "{a}" is not an IP address or network (e.g. 10.0.0.5, '
                        "10.0.0.0/24, ::1)"
                    ) from None
            out[name] = list(addresses)
        return out

    def address_allowed(self, calling_ae: str, address: str) -> bool:
        """False when ``calling_ae`` is pinned and ``address`` is not one of its addresses."""
        pins = self.calling_ae_addresses.get(calling_ae.strip())
        if not pins:
            return True
        try:
            ip = ipaddress.ip_address(address)
        except ValueError:
            return False
        return any(ip in ipaddress.ip_network(p, strict=False) for p in pins)

    def calling_ae_allowed(self, calling_ae: str) -> bool:
        return not self.allowed_calling_aes or calling_ae.strip() in self.allowed_calling_aes


class TlsConfig(Section):
    """TLS for the listener, and the certificates used when calling destinations with TLS.
    Paths are relative to the configuration file's folder."""

    #: the listener accepts TLS connections only (plain TCP is refused)
    enabled: bool = False
    #: our certificate chain (PEM); presented by the listener, and to TLS destinations
    certificate: str = ""
    #: our private key (PEM)
    private_key: str = ""
    #: password of an encrypted private key (masked by check-config)
    private_key_password: str = Field(default="", repr=False)
    #: CA certificates (PEM) trusted for peers: client certificates and TLS destinations;
    #: "" uses the system's default CAs for destinations
    ca_bundle: str = ""
    #: the listener demands a client certificate signed by ca_bundle
    require_client_certificate: bool = False
    minimum_version: Literal["1.2", "1.3"] = "1.2"


def _cores() -> int:
    """Cores this process may run on (at most 16)."""
    try:
        n = len(os.sched_getaffinity(0))
    except (AttributeError, OSError):
        n = os.cpu_count() or 1
    return max(1, min(n, 16))


def _graders() -> int:
    """Grading processes by default: one per core but one, which the receiver and the sender
    share (they answer the scanners and the PACS, and slow down when grading crowds them
    out; docs/performance.md has the measurement), and at least one."""
    return max(1, _cores() - 1)


class AssemblyConfig(Section):
    #: grade a study this many seconds after its last object arrived (0: at once)
    settle_seconds: float = Field(default=10.0, ge=0, le=86400)
    #: number of studies graded at the same time, each in a grading process of its own
    #: (default: one per core but one, left to the receiver and the sender; at least one)
    workers: int = Field(default_factory=_graders, ge=1, le=16)
    #: grading processes of ``serve`` that grade only on CPU time nothing else on the machine
    #: wants (Linux SCHED_IDLE while grading; their journal work at the normal priority): they
    #: take up a backlog on cores the receiver and the sender leave idle and give way at once
    #: when those want the core; 0: none
    spare_workers: int = Field(default=1, ge=0, le=16)


class SenderDefaults(Section):
    """What the grading assumes for studies from one sender when the SR does not say."""

    rhythm: Rhythm = Rhythm.unknown
    myocardial_disease: bool = False
    #: special situations (valve disease, transplant, ...) that always apply to this sender
    special_situations: list[SpecialSituation] = Field(default_factory=list)

    @field_validator("rhythm")
    @classmethod
    def _settable(cls, v: Rhythm) -> Rhythm:
        if v not in SETTABLE_RHYTHMS:
            allowed = ", ".join(r.value for r in SETTABLE_RHYTHMS)
            raise ValueError(f"'{v.value}' is only ever stated by an SR; allowed: {allowed}")
        return v


class GradingConfig(Section):
    guideline: Guideline = Guideline.ase_eacvi_2016
    #: also evaluate every other implemented guideline and report disagreements
    compare: bool = False
    #: LVEF below this (%) takes the reduced-LVEF pathway
    lvef_reduced_below: float = Field(default=50.0, gt=0, lt=100)
    #: UID root for result UIDs; "" gives 2.25 UUID-derived UIDs
    uid_root: str = ""
    #: site code-mapping files (TOML), relative to the configuration file's folder
    mapping_files: list[str] = Field(default_factory=list)
    #: defaults for every sender, overridden per calling AE in [senders.AET]
    defaults: SenderDefaults = Field(default_factory=SenderDefaults)
    #: the documented readings of ambiguous published rules, per guideline (never thresholds)
    switches: RuleSwitches = Field(default_factory=RuleSwitches)

    @field_validator("uid_root")
    @classmethod
    def _root(cls, v: str) -> str:
        v = v.strip()
        if v and (not _UID.match(v) or len(v) > 40):
            raise ValueError("a UID root is dotted digits without leading zeros, at most 40 long")
        return v


class DestinationConfig(Section):
    """A DICOM peer that receives results by C-STORE."""

    ae_title: AETitle
    host: str = Field(min_length=1)
    port: int = Field(ge=1, le=65535)
    #: call this peer over TLS (verified against tls.ca_bundle; our tls.certificate, when
    #: set, is presented as client certificate)
    tls: bool = False
    #: also send the one-page summary (Encapsulated PDF) right after each result SR
    summary_pdf: bool = False
    #: user identity negotiation (PS3.7 D.3.3.7) on associations to this peer: a username,
    #: with a passcode when ``password`` is set; "" sends none
    username: str = ""
    #: the passcode sent with ``username`` (masked by check-config, never logged)
    password: str = Field(default="", repr=False)
    #: ask the peer to confirm the identity (positive response requested)
    user_identity_response: bool = False

    @field_validator("ae_title")
    @classmethod
    def _ae(cls, v: str) -> str:
        return check_ae_title(v)

    @property
    def target(self) -> str:
        """How logs and the journal name this peer: ``AET@HOST:PORT``."""
        return f"{self.ae_title}@{self.host}:{self.port}"


_URL = re.compile(r"^(?P<scheme>https?)://(?P<rest>[^/?#]+)(?P<path>/[^?#]*)?$", re.I)


def check_web_url(value: str) -> str:
    """A DICOMweb base URL: http or https, a host, an optional path; no user name or password
    in it (they would show wherever the URL is printed), no query or fragment."""
    text = value.strip()
    m = _URL.match(text)
    if not m:
        raise ValueError(
            "expected an http:// or https:// base URL of a DICOMweb service, without query or "
            "fragment, e.g. https://pacs.example/dicom-web"
        )
    if "@" in m["rest"]:
        raise ValueError(
            "a user name or password in the URL is not accepted (it would be printed and "
            "logged with the URL); give username and password, or token, as keys of their own"
        )
    return text.rstrip("/")


class WebPeer(Section):
    """A DICOMweb service (PS3.18): its base URL and how to authenticate to it."""

    #: base URL of the DICOMweb service (QIDO-RS, WADO-RS and STOW-RS below it)
    url: str
    #: HTTP basic authentication (both, or neither)
    username: str = ""
    password: str = Field(default="", repr=False)
    #: HTTP bearer token (instead of username and password)
    token: str = Field(default="", repr=False)
    #: verify the server's TLS certificate (https); switch off only for a test server
    tls_verify: bool = True
    #: CA certificates (PEM) to verify the server with; "" uses the HTTP client's defaults
    ca_bundle: str = ""
    #: seconds to wait for the server to connect and for each response
    timeout: float = Field(default=30.0, gt=0, le=3600)

    @field_validator("url")
    @classmethod
    def _url(cls, v: str) -> str:
        return check_web_url(v)

    @property
    def target(self) -> str:
        """How logs and the journal name this peer: its base URL (never a credential)."""
        return self.url

    @property
    def secure(self) -> bool:
        return self.url.lower().startswith("https://")


class DicomwebDestinationConfig(WebPeer):
    """A DICOMweb service that receives results by STOW-RS."""

    #: also send the one-page summary (Encapsulated PDF) right after each result SR
    summary_pdf: bool = False


#: tags of the two kinds of peer in error locations (``destinations.X.dicomweb.url``): left out
#: of the key paths shown to the user
_PEER_TAGS = ("dicom", "dicomweb")


def _peer_kind(value: Any) -> str:
    """A table with ``url`` is a DICOMweb peer; any other a DICOM (DIMSE) one."""
    if isinstance(value, dict):
        return "dicomweb" if "url" in value else "dicom"
    return "dicomweb" if isinstance(value, WebPeer) else "dicom"


AnyDestination = Annotated[
    Annotated[DestinationConfig, Tag("dicom")]
    | Annotated[DicomwebDestinationConfig, Tag("dicomweb")],
    Discriminator(_peer_kind),
]


class DimseArchiveConfig(Section):
    """An archive queried by C-FIND and retrieved from by C-GET or C-MOVE (``backfill``)."""

    ae_title: AETitle
    host: str = Field(min_length=1)
    port: int = Field(ge=1, le=65535)
    #: call the archive over TLS (as for destinations: tls.ca_bundle, tls.certificate)
    tls: bool = False
    #: retrieve by C-MOVE to this AE title (a node the archive knows) instead of C-GET; ""
    #: retrieves by C-GET
    move_to: str = ""

    @field_validator("ae_title")
    @classmethod
    def _ae(cls, v: str) -> str:
        return check_ae_title(v)

    @field_validator("move_to")
    @classmethod
    def _move_to(cls, v: str) -> str:
        return check_ae_title(v) if v.strip() else ""

    @property
    def target(self) -> str:
        return f"{self.ae_title}@{self.host}:{self.port}"

    @property
    def calling_ae(self) -> str:
        """The AE title its objects are recorded under (routes, [senders] defaults): the
        archive's own, as when it sends them by C-MOVE."""
        return self.ae_title


class DicomwebArchiveConfig(WebPeer):
    """An archive queried by QIDO-RS and retrieved from by WADO-RS (``backfill``)."""

    #: the AE title its studies are recorded under, for routes and [senders] defaults
    ae_title: AETitle = "DICOMWEB"

    @field_validator("ae_title")
    @classmethod
    def _ae(cls, v: str) -> str:
        return check_ae_title(v)

    @property
    def calling_ae(self) -> str:
        return self.ae_title


AnyArchive = Annotated[
    Annotated[DimseArchiveConfig, Tag("dicom")] | Annotated[DicomwebArchiveConfig, Tag("dicomweb")],
    Discriminator(_peer_kind),
]


class RouteConfig(Section):
    #: calling AE title of the sender, or "*" for every sender without a route of its own
    calling_ae: str
    destinations: list[str] = Field(default_factory=list)

    @field_validator("calling_ae")
    @classmethod
    def _calling(cls, v: str) -> str:
        return v if v == DEFAULT_ROUTE else check_ae_title(v)


class DeliveryConfig(Section):
    #: attempts per result and destination before it is marked failed (never dropped)
    max_attempts: int = Field(default=10, ge=1, le=10000)
    backoff_initial_seconds: float = Field(default=5.0, gt=0)
    backoff_max_seconds: float = Field(default=600.0, gt=0)
    #: also write every result into this folder (relative to data_dir); "" disables
    results_folder: str = "results"
    #: write the one-page summary (Encapsulated PDF) into the results folder too, also when
    #: no destination asks for it (it always goes there when one does)
    summary_pdf_in_results_folder: bool = False
    #: paper size of the summary
    summary_page_size: Literal["A4", "Letter"] = "A4"


class RetentionConfig(Section):
    """Purge of finished work from the journal (never pending work)."""

    #: delete the stored sources and results of studies finished this many days ago (delivered,
    #: or not gradable with nothing left to deliver); 0 keeps everything
    days: float = Field(default=0, ge=0, le=36500)
    #: how often the purge runs, hours
    interval_hours: float = Field(default=6, gt=0, le=168)


class JournalConfig(Section):
    """Where the node's roles share their work."""

    #: "" keeps the journal in the data directory (SQLite, one machine);
    #: "postgresql://USER@HOST:PORT/DATABASE" shares it with every node using the same
    #: database (the objects go into the database too); never a password in it
    url: str = ""
    #: the database password (masked by check-config, never logged); "" leaves it to libpq
    #: (the PGPASSWORD variable, the ~/.pgpass file)
    password: str = Field(default="", repr=False)

    #: seconds a claim on a study or a delivery holds without being renewed: work of a
    #: process or node that died is taken over after it
    lease_seconds: float = Field(default=30.0, ge=2, le=3600)


class LoggingConfig(Section):
    #: "json": one JSON object per line (for log collectors); "text": human-readable lines
    format: Literal["json", "text"] = "json"
    level: Literal["DEBUG", "INFO", "WARNING", "ERROR"] = "INFO"
    #: add patient name and ID to "object received" events (off: UIDs only)
    include_patient_identifiers: bool = False


class HttpConfig(Section):
    """The node's HTTP endpoint: /healthz, /metrics, and the status page (/) with the audit
    (/audit)."""

    enabled: bool = True
    #: loopback by default: expose it deliberately (e.g. "0.0.0.0" in a container)
    bind: str = "127.0.0.1"
    #: 0 lets the system pick a free port (written to run/listener.json)
    port: int = Field(default=DEFAULT_HTTP_PORT, ge=0, le=65535)
    #: /healthz fails below this much free space in the data directory, megabytes
    min_free_disk_mb: int = Field(default=500, ge=0)
    #: serve the status page (/) and the audit (/audit)
    status_page: bool = True
    #: HTTP basic authentication for every path but /healthz: give both user name and
    #: password, or neither (no authentication); the password is masked by check-config and
    #: never logged
    username: str = ""
    password: str = Field(default="", repr=False)

    @field_validator("username")
    @classmethod
    def _user(cls, v: str) -> str:
        if ":" in v or any(not ch.isprintable() for ch in v):
            raise ValueError("a user name has no colon and no control characters (RFC 7617)")
        return v


class AuditConfig(Section):
    """What the node records for the quality audit (``diastolic-sr audit``, ``/audit``)."""

    #: record patient name and ID with each study's audit facts, and show them where studies
    #: are listed (off: studies are counted, and listed by Study Instance UID only on request)
    include_patient_identifiers: bool = False
    #: the status page's /audit covers this many days back by default
    default_days: int = Field(default=30, ge=1, le=3660)


class Config(Section):
    node: NodeConfig = Field(default_factory=NodeConfig)
    limits: LimitsConfig = Field(default_factory=LimitsConfig)
    access: AccessConfig = Field(default_factory=AccessConfig)
    assembly: AssemblyConfig = Field(default_factory=AssemblyConfig)
    grading: GradingConfig = Field(default_factory=GradingConfig)
    senders: dict[str, SenderDefaults] = Field(default_factory=dict)
    destinations: dict[str, AnyDestination] = Field(default_factory=dict)
    routes: list[RouteConfig] = Field(default_factory=list)
    #: archives that ``backfill`` queries and retrieves from, by name
    archives: dict[str, AnyArchive] = Field(default_factory=dict)
    delivery: DeliveryConfig = Field(default_factory=DeliveryConfig)
    tls: TlsConfig = Field(default_factory=TlsConfig)
    retention: RetentionConfig = Field(default_factory=RetentionConfig)
    journal: JournalConfig = Field(default_factory=JournalConfig)
    logging: LoggingConfig = Field(default_factory=LoggingConfig)
    http: HttpConfig = Field(default_factory=HttpConfig)
    audit: AuditConfig = Field(default_factory=AuditConfig)
    #: folder of the configuration file (relative paths are resolved from it); not a TOML key
    base_dir: str = Field(default="", exclude=True)

    # -- derived values ------------------------------------------------------------------------

    @property
    def data_dir(self) -> Path:
        return _resolve(self.base_dir, self.node.data_dir)

    @property
    def results_dir(self) -> Path | None:
        folder = self.delivery.results_folder
        return None if not folder else _resolve(str(self.data_dir), folder)

    @property
    def mapping_paths(self) -> list[Path]:
        return [_resolve(self.base_dir, p) for p in self.grading.mapping_files]

    def destinations_for(self, calling_ae: str) -> list[str]:
        """Names of the destinations for results of studies sent by ``calling_ae``."""
        calling_ae = calling_ae.strip()
        for route in self.routes:
            if route.calling_ae == calling_ae:
                return list(route.destinations)
        for route in self.routes:
            if route.calling_ae == DEFAULT_ROUTE:
                return list(route.destinations)
        if not self.routes:  # no routing table: every destination is the default route
            return list(self.destinations)
        return []

    def tls_path(self, value: str) -> Path | None:
        return _resolve(self.base_dir, value) if value else None

    def summary_destinations(self, calling_ae: str) -> list[str]:
        """Destinations of ``calling_ae``'s results that also want the summary PDF."""
        return [n for n in self.destinations_for(calling_ae) if self.destinations[n].summary_pdf]

    def sender_defaults(self, calling_ae: str) -> SenderDefaults:
        return self.senders.get(calling_ae.strip(), self.grading.defaults)

    def grading_context(self, calling_ae: str) -> Context:
        d = self.sender_defaults(calling_ae)
        return Context(
            rhythm=d.rhythm,
            myocardial_disease=d.myocardial_disease,
            lvef_reduced_below=self.grading.lvef_reduced_below,
            special_situations=frozenset(d.special_situations),
        )

    def digest(self) -> str:
        """Short digest of the effective configuration (for logs and status)."""
        text = json.dumps(self.model_dump(mode="json"), sort_keys=True)
        return hashlib.sha256(text.encode()).hexdigest()[:16]

    def masked(self) -> dict[str, Any]:
        """The effective configuration as plain data, secrets replaced by :data:`MASK`."""
        data = self.model_dump(mode="json")
        for section, key in SECRET_KEYS:
            if data.get(section, {}).get(key):
                data[section][key] = MASK
        for section in ("destinations", "archives"):
            for peer in data.get(section, {}).values():
                for key in PEER_SECRET_KEYS:
                    if peer.get(key):
                        peer[key] = MASK
        return data


#: (section, key) of every secret: never printed or logged
SECRET_KEYS: tuple[tuple[str, str], ...] = (
    ("tls", "private_key_password"),
    ("journal", "password"),
    ("http", "password"),
)
#: keys of a destination or archive entry that are secrets: never printed or logged
PEER_SECRET_KEYS: tuple[str, ...] = ("password", "token")

#: sections and keys that only take effect on a restart (a reload keeps the running values)
RESTART_ONLY: tuple[str, ...] = (
    "node",
    "limits",
    "tls",
    "http",
    "assembly.workers",
    "assembly.spare_workers",
    "journal",
    "logging.format",
)


def _resolve(base: str, path: str) -> Path:
    p = Path(path).expanduser()
    if not p.is_absolute() and base:
        p = Path(base) / p
    return p


# ---------------------------------------------------------------------------------------------
# Loading and validation
# ---------------------------------------------------------------------------------------------


def default_config() -> Config:
    """The embedded defaults (what ``serve`` runs on with no configuration file)."""
    return Config()


def load_config(path: str | Path | None) -> Config:
    """Read and validate a configuration file; ``None`` gives the embedded defaults."""
    if path is None:
        return default_config()
    p = Path(path)
    try:
        text = p.read_text(encoding="utf-8")
    except OSError as exc:
        raise UserError(f"cannot read configuration {p}: {exc.strerror or exc}") from None
    except UnicodeDecodeError:
        raise UserError(f"configuration {p} is not UTF-8 text") from None
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise UserError(f"configuration {p}: not valid TOML: {exc}") from None
    return config_from_dict(data, base_dir=str(p.resolve().parent), source=str(p))


def config_from_dict(data: dict[str, Any], *, base_dir: str = "", source: str = "") -> Config:
    if "base_dir" in data:
        raise UserError(_prefix(source) + "base_dir: unknown key")
    try:
        cfg = Config.model_validate({**data, "base_dir": base_dir})
    except ValidationError as exc:
        raise UserError(_prefix(source) + _describe(exc)) from None
    problems = list(_cross_check(cfg))
    if problems:
        raise UserError(_prefix(source) + "; ".join(problems))
    return cfg


def _prefix(source: str) -> str:
    return f"configuration {source}: " if source else "configuration: "


def _cross_check(cfg: Config) -> Iterable[str]:
    defined = ", ".join(sorted(cfg.destinations)) or "none"
    for name in cfg.destinations:
        if not re.match(r"^[A-Za-z0-9_.-]{1,64}$", name):
            yield (
                f'destinations.{name}: bad destination name "{name}"; allowed: letters, digits, '
                "'_', '.', '-' (at most 64)"
            )
    for name in cfg.archives:
        if not re.match(r"^[A-Za-z0-9_.-]{1,64}$", name):
            yield (
                f'archives.{name}: bad archive name "{name}"; allowed: letters, digits, '
                "'_', '.', '-' (at most 64)"
            )
    for section, peers in (("destinations", cfg.destinations), ("archives", cfg.archives)):
        for name, peer in peers.items():
            if isinstance(peer, WebPeer):
                yield from _check_web_peer(cfg, f"{section}.{name}", peer)
    for name in cfg.senders:
        try:
            check_ae_title(name)
        except ValueError as exc:
            yield f'senders."{name}": {exc}'
    seen: dict[str, int] = {}
    for i, route in enumerate(cfg.routes):
        if route.calling_ae in seen:
            yield (
                f'routes[{i}].calling_ae: "{route.calling_ae}" already routed by '
                f"routes[{seen[route.calling_ae]}]"
            )
        seen.setdefault(route.calling_ae, i)
        for j, dest in enumerate(route.destinations):
            if dest not in cfg.destinations:
                yield (
                    f'routes[{i}].destinations[{j}]: unknown destination "{dest}"; '
                    f"defined: {defined}"
                )
    if cfg.grading.guideline not in IMPLEMENTED_GUIDELINES:
        why = NOT_AVAILABLE.get(cfg.grading.guideline, "not implemented in full")
        yield (
            f'grading.guideline: "{cfg.grading.guideline.value}" is not available ({why}); '
            "allowed: " + ", ".join(g.value for g in IMPLEMENTED_GUIDELINES)
        )
    allowed = cfg.access.allowed_calling_aes
    for aet in cfg.access.calling_ae_addresses:
        if allowed and aet not in allowed:
            yield (
                f'access.calling_ae_addresses."{aet}": not in access.allowed_calling_aes; '
                f"allowed: {', '.join(allowed)}"
            )
    tls = cfg.tls
    if tls.enabled:
        for key in ("certificate", "private_key"):
            if not getattr(tls, key):
                yield f'tls.{key}: required when tls.enabled = true (a PEM file path); got ""'
    if tls.require_client_certificate and not tls.ca_bundle:
        yield (
            'tls.ca_bundle: required when tls.require_client_certificate = true; got "" '
            "(the CA certificates that sign the client certificates)"
        )
    if tls.require_client_certificate and not tls.enabled:
        yield "tls.require_client_certificate: true needs tls.enabled = true"
    if bool(tls.certificate) != bool(tls.private_key):
        yield "tls.certificate and tls.private_key: give both or neither"
    for key in ("certificate", "private_key", "ca_bundle"):
        value = getattr(tls, key)
        if value:
            path = _resolve(cfg.base_dir, value)
            if not path.is_file():
                yield f'tls.{key}: "{value}" is not a readable file ({path})'
    same_port = cfg.http.enabled and cfg.http.port and cfg.http.port == cfg.node.port
    if same_port and (cfg.http.bind in (cfg.node.bind, "", "0.0.0.0") or cfg.node.bind == ""):
        yield f"http.port: {cfg.http.port} is the DICOM port (node.port); choose another"
    if cfg.journal.url:
        from service.store.postgres_journal import check_url

        try:
            check_url(cfg.journal.url)
        except UserError as exc:
            yield f"journal.url: {str(exc).removeprefix('journal: ')}"
    if bool(cfg.http.username) != bool(cfg.http.password):
        yield (
            "http.username and http.password: give both (basic authentication) or neither; got "
            + ("a user name only" if cfg.http.username else "a password only")
        )
    for name, dest in cfg.destinations.items():
        if dest.password and not dest.username:
            yield f"destinations.{name}.password: set destinations.{name}.username too"
    if cfg.delivery.backoff_max_seconds < cfg.delivery.backoff_initial_seconds:
        yield (
            f"delivery.backoff_max_seconds: {cfg.delivery.backoff_max_seconds} is below "
            f"delivery.backoff_initial_seconds ({cfg.delivery.backoff_initial_seconds})"
        )


_LOOPBACK_HOSTS = ("localhost", "127.0.0.1", "[::1]")


def _check_web_peer(cfg: Config, where: str, peer: WebPeer) -> Iterable[str]:
    if bool(peer.username) != bool(peer.password):
        yield f"{where}: give both username and password (HTTP basic authentication), or neither"
    if peer.token and (peer.username or peer.password):
        yield f"{where}: token (bearer) and username/password exclude each other; give one"
    host = peer.url.split("://", 1)[1].split("/", 1)[0].rsplit(":", 1)[0].lower()
    if (peer.password or peer.token) and not peer.secure and host not in _LOOPBACK_HOSTS:
        yield (
            f'{where}.url: "{peer.url}" is plain http; credentials are sent only over https '
            "(or to a loopback address)"
        )
    if peer.ca_bundle:
        path = _resolve(cfg.base_dir, peer.ca_bundle)
        if not path.is_file():
            yield f'{where}.ca_bundle: "{peer.ca_bundle}" is not a readable file ({path})'
        if not peer.tls_verify:
            yield f"{where}.ca_bundle: set, but tls_verify = false verifies nothing"


def _loc(loc: Sequence[int | str]) -> str:
    loc = _without_tags(loc)
    out = ""
    for part in loc:
        if isinstance(part, int):
            out += f"[{part}]"
        else:
            out += ("." if out else "") + str(part)
    return out or "(top level)"


def _without_tags(loc: Sequence[int | str]) -> list[int | str]:
    """``loc`` without the tag pydantic puts after a destination's or archive's name."""
    parts = list(loc)
    if len(parts) > 2 and parts[0] in ("destinations", "archives") and parts[2] in _PEER_TAGS:
        del parts[2]
    return parts


def _model_at(loc: Sequence[int | str]) -> type[BaseModel] | None:
    """The model class that holds the last key of ``loc`` (to list the allowed keys)."""
    model: Any = Config
    if len(loc) > 2 and loc[0] in ("destinations", "archives") and loc[2] in _PEER_TAGS:
        kinds = {
            "destinations": (DestinationConfig, DicomwebDestinationConfig),
            "archives": (DimseArchiveConfig, DicomwebArchiveConfig),
        }[str(loc[0])]
        model = kinds[_PEER_TAGS.index(str(loc[2]))]
        loc = loc[3:]
    for part in loc[:-1]:
        if isinstance(model, type) and issubclass(model, BaseModel):
            field = model.model_fields.get(str(part))
            if field is None:
                return None
            model = field.annotation
            continue
        # list[X] / dict[str, X]: this part is an index or key, step into X
        args = typing.get_args(model)
        if not args:
            return None
        model = args[-1]
    while not (isinstance(model, type) and issubclass(model, BaseModel)):
        args = typing.get_args(model)
        if not args or isinstance(model, types.UnionType):
            return None
        model = args[-1]
    return model


def _describe(exc: ValidationError) -> str:
    lines = []
    for err in exc.errors():
        loc = err["loc"]
        where = _loc(loc)
        kind = err["type"]
        if kind == "extra_forbidden":
            model = _model_at(loc)
            allowed = ", ".join(k for k in model.model_fields if k != "base_dir") if model else "?"
            lines.append(f"{where}: unknown key; allowed: {allowed}")
            continue
        bad = err.get("input")
        if loc and loc[-1] in (*PEER_SECRET_KEYS, "private_key_password"):
            bad = MASK  # a secret is never printed, not even a wrong one
        elif loc and loc[-1] == "url" and isinstance(bad, str):
            bad = re.sub(r"//[^/@]*@", f"//{MASK}@", bad)  # credentials in a URL
        msg = str(err["msg"]).removeprefix("Value error, ")
        if kind == "enum" and err.get("ctx", {}).get("expected"):
            msg = f"must be one of {err['ctx']['expected']}"
        if kind == "missing":
            lines.append(f"{where}: required key missing")
        else:
            lines.append(f"{where}: {_show(bad)} is not allowed: {msg}")
    return "; ".join(lines)


def _show(value: Any) -> str:
    text = json.dumps(value, default=str) if not isinstance(value, str) else f'"{value}"'
    return text if len(text) <= 80 else text[:77] + "..."


# ---------------------------------------------------------------------------------------------
# Command-line overrides
# ---------------------------------------------------------------------------------------------

_FORWARD = re.compile(r"^(?P<aet>[^@]{1,16})@(?P<host>[^:@]+|\[[0-9a-fA-F:]+\]):(?P<port>\d{1,5})$")


def parse_forward(text: str) -> DestinationConfig:
    """``AET@HOST:PORT`` -> a destination."""
    m = _FORWARD.match(text.strip())
    if not m:
        raise UserError(f'--forward "{text}": expected AET@HOST:PORT, e.g. PACS@127.0.0.1:104')
    try:
        return DestinationConfig(ae_title=m["aet"], host=m["host"].strip("[]"), port=int(m["port"]))
    except ValidationError as exc:
        raise UserError(f'--forward "{text}": {_describe(exc)}') from None


def apply_overrides(
    cfg: Config,
    *,
    port: int | None = None,
    ae_title: str | None = None,
    forward: Sequence[str] = (),
    data_dir: str | None = None,
    settle_seconds: float | None = None,
    bind: str | None = None,
    http_port: int | None = None,
    lease_seconds: float | None = None,
    journal: str | None = None,
) -> Config:
    """The configuration with command-line flags applied (each flag beats the file).

    ``--forward`` destinations are named ``FORWARD_1``, ``FORWARD_2``, ... and join the
    default route (``*``), which is created when the routing table has none."""
    data = cfg.model_dump(mode="json")
    data["base_dir"] = cfg.base_dir
    if port is not None:
        data["node"]["port"] = port
    if ae_title is not None:
        data["node"]["ae_title"] = ae_title
    if bind is not None:
        data["node"]["bind"] = bind
    if data_dir is not None:
        data["node"]["data_dir"] = str(Path(data_dir).expanduser().resolve())
    if settle_seconds is not None:
        data["assembly"]["settle_seconds"] = settle_seconds
    if http_port is not None:
        data["http"]["port"] = http_port
    if lease_seconds is not None:
        data["journal"]["lease_seconds"] = lease_seconds
    if journal is not None:
        data["journal"]["url"] = journal
    names = []
    for i, text in enumerate(forward, start=1):
        dest = parse_forward(text)
        name = f"FORWARD_{i}"
        data["destinations"][name] = dest.model_dump(mode="json")
        names.append(name)
    if names and data["routes"]:
        for route in data["routes"]:
            if route["calling_ae"] == DEFAULT_ROUTE:
                route["destinations"] = [*route["destinations"], *names]
                break
        else:
            data["routes"].append({"calling_ae": DEFAULT_ROUTE, "destinations": names})
    base = data.pop("base_dir")
    return config_from_dict(data, base_dir=base, source="(command line)")
