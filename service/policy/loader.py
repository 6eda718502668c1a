"""Read the shipped default policy and lay a site's own file over it."""

from __future__ import annotations

import tomllib
from importlib import resources
from pathlib import Path
from typing import Any

from pydantic import ValidationError

from service.errors import PolicyError
from service.policy.model import Policy

SITE_SOURCE = "site policy"


def default_policy_data() -> dict[str, Any]:
    """The shipped defaults as plain TOML data."""
    text = resources.files("service.policy").joinpath("default.toml").read_text("utf-8")
    return tomllib.loads(text)


def merge(base: dict[str, Any], site: dict[str, Any], label: str) -> dict[str, Any]:
    """Lay site values over base; a changed value's source becomes the site's.

    A bare value where the default is a sourced table (``{value = .., source = ..}``) replaces
    the value; so does a table that changes values without naming its own source.
    """
    out = dict(base)
    for key, new in site.items():
        old = base.get(key)
        if isinstance(old, dict) and isinstance(new, dict):
            merged = merge(old, new, label)
            if "source" in old and "source" not in new and any(k != "source" for k in new):
                merged["source"] = label
            out[key] = merged
        elif isinstance(old, dict) and "source" in old and not isinstance(new, dict):
            slot = "values" if "values" in old else "value"
            out[key] = {**old, slot: new, "source": label}
        else:
            out[key] = new
    return out


def load_policy(site_file: Path | None = None) -> Policy:
    """The policy in force: defaults, with the site file (if any) laid over them."""
    data = default_policy_data()
    if site_file is not None:
        try:
            site = tomllib.loads(site_file.read_text("utf-8"))
        except OSError as exc:
            raise PolicyError(
                f"site policy file {site_file} cannot be read: {exc.strerror}"
            ) from exc
        except (tomllib.TOMLDecodeError, UnicodeDecodeError) as exc:
            raise PolicyError(f"site policy file {site_file} is not valid TOML: {exc}") from exc
        data = merge(data, site, f"{SITE_SOURCE} ({site_file.name})")
    try:
        return Policy.model_validate(data)
    except ValidationError as exc:
        problems = "; ".join(
            f"{'.'.join(str(p) for p in e['loc'])}: {e['msg']}" for e in exc.errors()
        )
        raise PolicyError(f"site policy is invalid: {problems}") from exc
