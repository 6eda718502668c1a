"""The clinical audit at full size: `capnote audit` over a year of 100,000 sessions.

Fills a database with 100,000 final sessions, then times the audit's SQL aggregates alone
(Store.audit_figures, which joins each session's review visits) and the whole command
(`capnote audit ... --report`, a process of its own, HTML and CSV), and prints the
figures. The target is under 10 s for the command.

The rows are written straight into note_version, not through the service (which would take
minutes on two cores and is benchmarked elsewhere): one real note is submitted through the
service, and its row is copied 100,000 times with invented, deterministic variations of
what the audit reads (session start, unit, clinician, total energy, IOP rise grade,
glaucoma, prophylaxis, days from cataract surgery, review booked); one review of it is
submitted too, and copied for nine sessions in ten (attended or missed, with invented
findings). Run it by hand:

    python bench/audit.py [--sessions N] [--postgres]
"""

from __future__ import annotations

import argparse
import asyncio
import os
import random
import subprocess
import sys
import tempfile
import time
from datetime import UTC, datetime, timedelta
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
if str(ROOT) not in sys.path:  # run as `python bench/audit.py`
    sys.path.insert(0, str(ROOT))

import orjson  # noqa: E402
from sqlalchemy import insert, select  # noqa: E402

from capnote.assess import Assessor  # noqa: E402
from capnote.audit.demo_year import CLINICIANS, STAFF, UNITS, reviews, sessions  # noqa: E402
from capnote.notes import NoteService, Principal  # noqa: E402
from capnote.policy import load_policy  # noqa: E402
from capnote.reviews import ReviewService  # noqa: E402
from capnote.store.base import VERSION_COLUMNS  # noqa: E402
from capnote.store.database import make_engine, migrate, open_store  # noqa: E402
from capnote.store.tables import NoteVersion, ReviewVersion  # noqa: E402

START = datetime(2025, 12, 1, tzinfo=UTC)
NOW = datetime(2026, 12, 1, tzinfo=UTC)


def fill(url: str, count: int) -> float:
    """Write count sessions; seconds taken."""
    migrate(url)

    async def one() -> None:
        service = NoteService(open_store(url), Assessor(load_policy()), lambda: NOW)
        who = Principal("bench", "submitter")
        try:
            note = next(sessions(1))
            await service.submit(orjson.dumps(note), who)
            review = next(r for r in reviews([note] * 40, NOW) if r["attended"])
            visits = ReviewService(service.store, service.assessor, lambda: NOW)
            await visits.submit(orjson.dumps(review), who)
        finally:
            await service.store.aclose()

    asyncio.run(one())
    began = time.perf_counter()
    table = NoteVersion.__table__  # type: ignore[attr-defined]
    visits = ReviewVersion.__table__  # type: ignore[attr-defined]
    review_columns = [c.name for c in visits.columns if c.name != "id"]
    engine = make_engine(url)
    rng = random.Random(19)  # noqa: S311 - invented bench data
    with engine.begin() as connection:
        template = dict(
            zip(
                VERSION_COLUMNS,
                connection.execute(select(*(table.c[n] for n in VERSION_COLUMNS))).one(),
                strict=True,
            )
        )
        seen = dict(
            zip(
                review_columns,
                connection.execute(select(*(visits.c[n] for n in review_columns))).one(),
                strict=True,
            )
        )
        batch, reviewed = [], []
        for i in range(count):
            unit, staff, name, p_moderate, p_severe = CLINICIANS[i % len(CLINICIANS)]
            draw = rng.random()
            grade = (
                "severe"
                if draw < p_severe
                else "moderate"
                if draw < p_severe + p_moderate
                else "mild"
            )
            row = dict(template)
            row.update(
                note_key=f"bench-{i:08d}",
                version=1,
                sender_value=f"B-{i:08d}",
                patient_value=f"BP{i:08d}",
                eye=("right", "left")[i % 2],
                started_at=START + timedelta(seconds=i * 365 * 86400 // count),
                total_energy_mj=round(rng.lognormvariate(3.7, 0.55), 1),
                site=UNITS[unit][0],
                site_name=UNITS[unit][1],
                performer=f"{STAFF}|{staff}",
                performer_name=name,
                spike_grade=grade,
                glaucoma="mild" if rng.random() < 0.12 else "none",
                prophylaxis=rng.random() < 0.7,
                cataract_days=rng.randint(120, 1500),
                review_booked=True,
            )
            batch.append(row)
            if rng.random() < 0.9:
                attended = rng.random() < 0.9

                def found(chance: float, attended: bool = attended) -> bool | None:
                    return (rng.random() < chance) if attended and rng.random() > 0.1 else None

                visit = dict(seen)
                visit.update(
                    review_key=f"bench-review-{i:08d}",
                    session_key=row["note_key"],
                    sender_value=f"BR-{i:08d}",
                    patient_value=row["patient_value"],
                    eye=row["eye"],
                    seen_at=row["started_at"] + timedelta(days=28),
                    attended=attended,
                    retinal_detachment=found(0.009),
                    cystoid_macular_oedema=found(0.012),
                    anterior_uveitis=found(0.03),
                    raised_iop=found(0.02),
                    iol_pits=found(0.08),
                    retreatment=found(0.03),
                    opening_adequate=found(0.95),
                )
                reviewed.append(visit)
            if len(batch) == 5000:
                connection.execute(insert(table), batch)
                connection.execute(insert(visits), reviewed)
                batch, reviewed = [], []
        if batch:
            connection.execute(insert(table), batch)
        if reviewed:
            connection.execute(insert(visits), reviewed)
    engine.dispose()
    return time.perf_counter() - began


def aggregates(url: str) -> float:
    """Seconds for Store.audit_figures over the year."""

    async def run() -> float:
        store = open_store(url)
        try:
            began = time.perf_counter()
            groups = await store.audit_figures(START, NOW, None)
            took = time.perf_counter() - began
            assert sum(g.counts["sessions"] or 0 for g in groups if g.level == "all") >= 100
            return took
        finally:
            await store.aclose()

    return asyncio.run(run())


def command(url: str, report: Path) -> float:
    """Wall seconds of the whole `capnote audit` process."""
    env = {**os.environ, "CAPNOTE_DATABASE_URL": url, "PYTHONPATH": str(ROOT / "service")}
    args = ["audit", "--from", "2025-12-01", "--to", "2026-11-30", "--report", str(report)]
    began = time.perf_counter()
    subprocess.run(  # noqa: S603 (argv built here from constants)
        [sys.executable, "-c", "from capnote.cli import main; main()", *args],
        env=env,
        check=True,
        capture_output=True,
    )
    return time.perf_counter() - began


def measure(engine: str, url: str, count: int, work: Path) -> None:
    filled = fill(url, count)
    print(f"{engine}: {count + 1} sessions written in {filled:.1f} s")
    for attempt in (1, 2):
        print(f"{engine}: aggregates (Store.audit_figures), run {attempt}: {aggregates(url):.2f} s")
    for suffix in ("html", "csv"):
        report = work / f"audit-{engine}.{suffix}"
        took = command(url, report)
        size = report.stat().st_size
        print(f"{engine}: capnote audit --report .{suffix}: {took:.2f} s wall, {size} bytes")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--sessions", type=int, default=100_000)
    parser.add_argument("--postgres", action="store_true", help="also on a throwaway cluster")
    options = parser.parse_args()
    with tempfile.TemporaryDirectory(prefix="capnote-audit-") as scratch:
        work = Path(scratch)
        measure("SQLite", f"sqlite:///{work / 'capnote.sqlite3'}", options.sessions, work)
        if options.postgres:
            from tests.pg_cluster import PgCluster

            with PgCluster() as cluster:
                measure(
                    "PostgreSQL", cluster.fresh_database("capnote_audit"), options.sessions, work
                )


if __name__ == "__main__":
    main()
