"""The site policy: shipped defaults with their sources, and a site's overrides."""

from service.policy.loader import load_policy
from service.policy.model import Policy

__all__ = ["Policy", "load_policy"]
