"""The one Settings class: environment variables with a CAPNOTE_ prefix, or a .env file.

Nothing else in capnote reads the environment; entry points build Settings and pass it on.
"""

from __future__ import annotations

import ipaddress
from pathlib import Path
from typing import TYPE_CHECKING, Annotated

from pydantic import Field, ValidationError, field_validator
from pydantic_settings import BaseSettings, SettingsConfigDict

from capnote.errors import PolicyError
from capnote.fhir.bundle import OutputCheck
from capnote.logs import LogFormat, LogLevel
from capnote.policy import Policy, load_policy
from capnote.policy.model import RecordPolicy, ReferenceMode

if TYPE_CHECKING:
    from capnote.delivery import Receiver


class Settings(BaseSettings):
    """Deployment settings; clinical thresholds live in the site policy file instead."""

    model_config = SettingsConfigDict(env_prefix="CAPNOTE_", env_file=".env", extra="ignore")

    policy_file: Path | None = None
    clinic_timezone: str | None = None
    holiday_country: str | None = None
    holiday_subdivision: str | None = None
    database_url: str = "sqlite:///capnote.sqlite3"
    max_body_bytes: int = 1_048_576
    cors_origins: list[str] = []
    # Each connection, per process (capnote.connection_limits): the request line and headers
    # together, their number, the time for a head and for a body to arrive, how long an idle
    # keep-alive connection stays, and how many connections one process holds.
    max_head_bytes: Annotated[int, Field(ge=1_024, le=1_048_576)] = 32_768
    max_headers: Annotated[int, Field(ge=8, le=1_000)] = 100
    head_timeout_s: Annotated[float, Field(gt=0, le=300)] = 10.0
    body_timeout_s: Annotated[float, Field(gt=0, le=3_600)] = 30.0
    idle_timeout_s: Annotated[float, Field(gt=0, le=3_600)] = 5.0
    max_connections: Annotated[int, Field(ge=1, le=100_000)] = 1_000
    # Peers whose X-Forwarded-For and X-Forwarded-Proto are believed (addresses or networks):
    # the TLS proxy in front. Anyone else's forwarded headers are ignored.
    trusted_proxies: list[str] = ["127.0.0.1", "::1"]
    # The address clients reach capnote at (https://capnote.hospital.example): every link
    # the API writes (CapabilityStatement, searchset and history links) is built from it,
    # never from the Host header a client sends. Scheme and host (and port) only.
    public_base_url: Annotated[str | None, Field(pattern=r"^https?://[^/?#\s]+/?$")] = None
    # Host header values served (host names, no port); "*" serves any. With a public base
    # URL set, its host is always served.
    allowed_hosts: list[str] = ["*"]
    # Log lines: how much, and as text or JSON lines (also --log-level, --log-format).
    log_level: LogLevel = "info"
    log_format: LogFormat = "text"
    # `capnote serve` migrates once before starting workers and turns this off for them.
    migrate_on_start: bool = True
    # Forwarding to the hospital's FHIR server (off while forward_url is unset).
    forward_url: str | None = None
    forward_token: str | None = None
    forward_token_url: str | None = None
    forward_client_id: str | None = None
    forward_client_secret: str | None = None
    forward_timeout_s: float = 30.0
    # Run a delivery loop inside each service process; off when `capnote deliver` runs alone.
    deliver_in_service: bool = True
    # The hospital's numbering systems (URIs) for patient, visit and staff identifiers: the
    # form records every number under these, so clinicians never type a URI. Unset, the form
    # says the site has not set them and cannot save a note. The patient system is also the
    # one whose values are the site's Patient ids, so that a FHIR search patient=Patient/<id>
    # means that identifier (capnote keeps no Patient resources); unset, such a search is
    # refused with a hint.
    patient_id_system: str | None = None
    visit_id_system: str | None = None
    staff_id_system: str | None = None
    # How each emitted Bundle is checked before it leaves: "bindings" (required code
    # bindings; the default) or "r4b" (also the whole Bundle through the R4B models).
    output_check: OutputCheck = OutputCheck.BINDINGS
    # How the emitted record refers to patient, encounter and performer, over the site
    # policy's [record] table: the receiving server is a deployment's, so is its base.
    fhir_references: ReferenceMode | None = None
    fhir_reference_base: str | None = None

    @field_validator("trusted_proxies")
    @classmethod
    def _addresses(cls, value: list[str]) -> list[str]:
        for entry in value:
            # uvicorn would take a malformed address as a literal that never matches.
            ipaddress.ip_network(entry, strict=False)
        return value

    def receiver(self) -> Receiver | None:
        """The forwarding target, when one is configured."""
        if not self.forward_url:
            return None
        # Imported here: delivery brings httpx and the store, which only forwarding needs.
        from capnote.delivery import Receiver

        return Receiver(
            self.forward_url,
            self.forward_token,
            self.forward_token_url,
            self.forward_client_id,
            self.forward_client_secret,
            self.forward_timeout_s,
        )


def effective_policy(settings: Settings) -> Policy:
    """The site policy with the settings' calendar overrides laid on top."""
    policy = load_policy(settings.policy_file)
    overrides: dict[str, str | None] = {
        key: value
        for key, value in (
            ("timezone", settings.clinic_timezone),
            ("holiday_country", settings.holiday_country),
            ("holiday_subdivision", settings.holiday_subdivision),
        )
        if value is not None
    }
    policy = _record_overrides(policy, settings)
    if not overrides:
        return policy
    if settings.holiday_country is not None and settings.holiday_subdivision is None:
        # A subdivision belongs to its country: another country starts without one.
        overrides["holiday_subdivision"] = None
    calendar = policy.calendar.model_copy(update=overrides)
    return policy.model_copy(update={"calendar": calendar})


def _record_overrides(policy: Policy, settings: Settings) -> Policy:
    """The policy's [record] table with CAPNOTE_FHIR_REFERENCES and _BASE laid on top."""
    update: dict[str, str] = {}
    if settings.fhir_references is not None:
        update["references"] = settings.fhir_references
    if settings.fhir_reference_base is not None:
        update["reference_base"] = settings.fhir_reference_base
    if not update:
        return policy
    data = {**policy.record.model_dump(), **update, "source": "settings (CAPNOTE_FHIR_*)"}
    try:
        record = RecordPolicy.model_validate(data)
    except ValidationError as exc:
        problems = "; ".join(str(e["msg"]) for e in exc.errors())
        raise PolicyError(f"CAPNOTE_FHIR_REFERENCES / _REFERENCE_BASE: {problems}") from exc
    return policy.model_copy(update={"record": record})
