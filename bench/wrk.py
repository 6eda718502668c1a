"""Bounded load with wrk (Debian package `wrk`), in the same job format as bench/loadgen.py.

wrk is written in C: it spends a few microseconds of CPU per request where an asyncio client
spends a hundred or more, so on a 2-core machine it leaves the servers nearly both cores
(which is what two workers need to show how they scale). A Lua script gives every request
its own body (a new note each time), counts the status codes and prints a JSON summary.
"""

from __future__ import annotations

import json
import shutil
import subprocess
import tempfile
from pathlib import Path
from typing import Any

_SCRIPT = r"""
local items = {ITEMS}
local headers = {HEADERS}
local vary, tag = {VARY}, {TAG}
local counter = 0
statuses = {}
local threads = {}

setup = function(thread)
  threads[#threads + 1] = thread
end

-- One thread: one counter, so that no two requests carry the same number.
request = function()
  local item = items[(counter % #items) + 1]
  counter = counter + 1
  local body = item[3]
  if vary ~= nil and body ~= "" then
    body = body:gsub(vary, tag .. string.format("%07d", counter))
  end
  if body == "" then body = nil end
  return wrk.format(item[1], item[2], headers, body)
end

response = function(status, _headers, _body)
  statuses[status] = (statuses[status] or 0) + 1
end

done = function(summary, latency, _requests)
  -- Each wrk thread counts in its own Lua state; done() runs in the main one.
  local totals = {}
  for _, thread in ipairs(threads) do
    for status, count in pairs(thread:get("statuses")) do
      totals[status] = (totals[status] or 0) + count
    end
  end
  local parts = {}
  for status, count in pairs(totals) do
    parts[#parts + 1] = string.format('"%d": %d', status, count)
  end
  io.write(string.format(
    '{"requests": %d, "seconds": %f, "p50_ms": %f, "p99_ms": %f, "errors": %d, "statuses": {%s}}\n',
    summary.requests, summary.duration / 1e6, latency:percentile(50) / 1e3,
    latency:percentile(99) / 1e3,
    summary.errors.connect + summary.errors.read + summary.errors.write
      + summary.errors.timeout,
    table.concat(parts, ", ")))
end
"""


def available() -> bool:
    """True when wrk is installed."""
    return shutil.which("wrk") is not None


def _wrk() -> str:
    path = shutil.which("wrk")
    if path is None:
        raise RuntimeError("wrk is not installed (apt-get install wrk)")
    return path


def _lua(value: Any) -> str:
    """A Python value as a Lua literal (strings, lists and dicts of strings, None)."""
    if value is None:
        return "nil"
    if isinstance(value, str):
        # A long bracket string holds any text without escaping; pick a level it does not use.
        level = 0
        while f"]{'=' * level}]" in value:
            level += 1
        eq = "=" * level
        return f"[{eq}[{value}]{eq}]"
    if isinstance(value, list | tuple):
        return "{" + ", ".join(_lua(v) for v in value) + "}"
    if isinstance(value, dict):
        # "[ [[key]] ]": without the spaces Lua reads "[[[" as the start of a long string.
        return "{" + ", ".join(f"[ {_lua(k)} ] = {_lua(v)}" for k, v in value.items()) + "}"
    raise TypeError(type(value))


def run(job: dict[str, Any]) -> dict[str, Any]:
    """One load run: wrk for job['seconds'] with job['connections'] connections (a warm-up
    of one second first, not counted). The summary has loadgen.py's keys."""
    vary = job.get("vary")
    # Lua patterns treat some characters specially; the marker is plain letters and '_'.
    if vary is not None and not vary.replace("_", "").isalnum():
        raise ValueError("the vary marker must be letters, digits and underscores")
    script = (
        _SCRIPT.replace("{ITEMS}", _lua([list(i) for i in job["items"]]))
        .replace("{HEADERS}", _lua(job.get("headers", {})))
        .replace("{VARY}", _lua(vary))
    )
    url = f"http://{job['host']}:{job['port']}"
    with tempfile.TemporaryDirectory(prefix="capnote-wrk-") as tmp:
        results = []
        # wrk takes whole seconds: a shorter run (a smoke run's) lasts one.
        for phase, seconds in (("w", 1), ("m", max(1, round(job["seconds"])))):
            path = Path(tmp) / f"{phase}.lua"
            path.write_text(script.replace("{TAG}", _lua(f"{job.get('tag', '')}{phase}")))
            done = subprocess.run(  # noqa: S603 (argv built here from the job)
                [
                    _wrk(),
                    "-t1",
                    f"-c{job['connections']}",
                    f"-d{seconds}s",
                    "--timeout",
                    "30s",
                    "-s",
                    str(path),
                    url,
                ],
                capture_output=True,
                text=True,
                timeout=seconds + 120,
                check=False,
            )
            last = done.stdout.strip().splitlines()[-1:] or [""]
            # A script wrk cannot load is reported on stderr, and wrk then runs without it
            # (GET /): only the summary line that done() prints shows the script ran.
            if done.returncode != 0 or not last[0].startswith("{"):
                raise RuntimeError(f"wrk failed:\n{done.stderr[-3000:]}{done.stdout[-1000:]}")
            results.append(json.loads(last[0]))
    measured = results[-1]
    measured["rps"] = measured["requests"] / measured["seconds"] if measured["seconds"] else 0.0
    return measured
