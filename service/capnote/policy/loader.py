"""Read the shipped default policy and lay a site's own file over it."""

from __future__ import annotations

import math
import tomllib
from collections.abc import Iterator
from importlib import resources
from pathlib import Path
from typing import Any

from pydantic import ValidationError

from capnote.errors import PolicyError
from capnote.policy.model import Policy

SITE_SOURCE = "site policy"

# The key a bare site value replaces in a sourced default table, in order of preference:
# a threshold's value, a list's values, a finding's severity level.
_VALUE_SLOTS = ("values", "level", "value")


def default_policy_data() -> dict[str, Any]:
    """The shipped defaults as plain TOML data."""
    text = resources.files("capnote.policy").joinpath("default.toml").read_text("utf-8")
    return tomllib.loads(text)


def merge(base: dict[str, Any], site: dict[str, Any], label: str) -> dict[str, Any]:
    """Lay site values over base; a changed value's source becomes the site's.

    A bare value where the default is a sourced table (``{value = .., source = ..}``) replaces
    the value (``values`` for a list, ``level`` for a finding's severity); so does a table
    that changes values without naming its own source.
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
            slot = next((k for k in _VALUE_SLOTS if k in old), "value")
            out[key] = {**old, slot: new, "source": label}
        else:
            out[key] = new
    return out


def non_finite(node: Any, path: str = "") -> Iterator[str]:
    """Each NaN or infinity in TOML data, as ``key.path: value is not a finite number``.

    TOML writes them ``nan``, ``inf`` and ``-inf``; any comparison with NaN is false, so a
    threshold of NaN would silently switch its check off."""
    if isinstance(node, float) and not math.isfinite(node):
        yield f"{path}: {node} is not a finite number"
    elif isinstance(node, dict):
        for key, value in node.items():
            yield from non_finite(value, f"{path}.{key}" if path else str(key))
    elif isinstance(node, list):
        for i, value in enumerate(node):
            yield from non_finite(value, f"{path}[{i}]")


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
    # Checked after the merge so that a bare override names the slot it lands in
    # (``thresholds.usual_pulse_energy_max_mj.value``), as the policy's own layout does.
    infinite = list(non_finite(data))
    if infinite:
        where = f"site policy file {site_file}" if site_file is not None else "default policy"
        raise PolicyError(f"{where}: {'; '.join(infinite)}")
    try:
        return Policy.model_validate(data)
    except ValidationError as exc:
        problems = "; ".join(
            f"{'.'.join(str(p) for p in e['loc']) or 'policy'}: {e['msg']}" for e in exc.errors()
        )
        raise PolicyError(f"site policy is invalid: {problems}") from exc
