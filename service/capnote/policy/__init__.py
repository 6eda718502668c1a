"""The site policy: shipped defaults with their sources, and a site's overrides."""

from capnote.policy.loader import load_policy
from capnote.policy.model import (
    CLINICAL_FINDING_CODES,
    RISK_REASON_CODES,
    Policy,
    RiskReasonPolicy,
    SeverityLevel,
    SeverityPolicy,
)

__all__ = [
    "CLINICAL_FINDING_CODES",
    "RISK_REASON_CODES",
    "Policy",
    "RiskReasonPolicy",
    "SeverityLevel",
    "SeverityPolicy",
    "load_policy",
]
