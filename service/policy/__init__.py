"""The site policy: shipped defaults with their sources, and a site's overrides."""

from service.policy.loader import load_policy
from service.policy.model import (
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
