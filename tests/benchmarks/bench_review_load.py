"""Review load: 8 processes x 100 review actions against a two-worker server.

Run by hand (not part of the test suite):

    .venv/bin/python tests/benchmarks/bench_review_load.py [--processes 8] [--actions 100]
                                                           [--postgres postgresql+psycopg://...]

Each process plays one analyst and one reviewer and repeats: propose excluding one
sample (the server fits the comparison), then the reviewer rejects it (4 times in 5)
or the analyst withdraws it (1 in 5): two logged actions per round.  Afterwards the
database must hold every proposal, every decision and exactly one log entry per
action, and the hash chain must verify.  The reference is one process doing the same
work alone in the same run; the script prints throughput and latency and their ratios.

Data: the wine recognition data shipped with scikit-learn (Aeberhard, Coomans & de Vel
1992), 178 samples x 13 variables.
"""

from __future__ import annotations

import argparse
import multiprocessing
import statistics
import sys
import tempfile
import time
from pathlib import Path

import requests

HERE = Path(__file__).resolve().parent
sys.path[:0] = [str(HERE.parents[1]), str(HERE.parent / "webapp")]

from live_server import prepared_home, running_server  # noqa: E402
from wine_data import wine_csv  # noqa: E402

REASON = {"reason_category": "other", "reason": "load test: checking the queue under load"}


def _round(base, analyst, reviewer, sample, k):
    """One proposal and its end; returns the two request durations (seconds)."""
    t0 = time.perf_counter()
    r = requests.post(f"{base}/api/v1/datasets/{analyst['dataset_id']}/exclusions",
                      json={"samples": [sample], **REASON}, headers=analyst["headers"], timeout=120)
    t1 = time.perf_counter()
    if r.status_code != 201:
        raise RuntimeError(f"propose {sample}: {r.status_code} {r.text[:300]}")
    proposal_id = r.json()["proposal"]["id"]
    if k % 5 == 4:
        r = requests.post(f"{base}/api/v1/exclusions/{proposal_id}/withdraw", json={"comment": "load"},
                          headers=analyst["headers"], timeout=120)
    else:
        r = requests.post(f"{base}/api/v1/exclusions/{proposal_id}/reject",
                          json={"password": reviewer["password"], "comment": "load"},
                          headers=reviewer["headers"], timeout=120)
    t2 = time.perf_counter()
    if r.status_code != 200:
        raise RuntimeError(f"decide {proposal_id}: {r.status_code} {r.text[:300]}")
    return t1 - t0, t2 - t1


def _worker(job):
    base, analyst, reviewer, samples, actions = job
    durations = []
    for k in range(actions // 2):
        durations.extend(_round(base, analyst, reviewer, samples[k % len(samples)], k))
    return durations


def _run(base, pairs, samples, processes, actions):
    jobs = [(base, pairs[p][0], pairs[p][1], samples[p::processes], actions) for p in range(processes)]
    start = time.perf_counter()
    if processes == 1:
        results = [_worker(jobs[0])]
    else:
        with multiprocessing.get_context("spawn").Pool(processes) as pool:
            results = pool.map(_worker, jobs)
    wall = time.perf_counter() - start
    durations = [d for r in results for d in r]
    return wall, durations


def _p95(values):
    ordered = sorted(values)
    return ordered[int(0.95 * (len(ordered) - 1))]


def _summary(label, wall, durations):
    rate = len(durations) / wall
    proposals, decisions = durations[0::2], durations[1::2]  # each round: propose, then decide
    print(f"{label}: {len(durations)} actions in {wall:.1f} s = {rate:.1f} actions/s; "
          f"latency median {1000 * statistics.median(durations):.0f} ms, p95 {1000 * _p95(durations):.0f} ms "
          f"(propose median {1000 * statistics.median(proposals):.0f} ms, "
          f"reject/withdraw median {1000 * statistics.median(decisions):.0f} ms)")
    return rate, statistics.median(durations), _p95(durations)


def _check(app, expected_entries, expected_proposals):
    from sqlalchemy import func, select

    from webapp.services import audit
    from webapp.store import session_scope
    from webapp.store.tables import ExclusionProposal, ReviewLogEntry, SignOff

    with app.app_context(), session_scope() as s:
        entries = s.scalar(select(func.count()).select_from(ReviewLogEntry))
        proposals = s.scalar(select(func.count()).select_from(ExclusionProposal))
        sign_offs = s.scalar(select(func.count()).select_from(SignOff))
        open_left = s.scalar(select(func.count()).select_from(ExclusionProposal)
                             .where(ExclusionProposal.state == "proposed"))
        verified = audit.verify_chain(s)
    print(f"stored: {entries} log entries (expected {expected_entries}), {proposals} proposals "
          f"(expected {expected_proposals}), {sign_offs} sign-offs, {open_left} left open; chain: {verified}")
    ok = entries == expected_entries and proposals == expected_proposals and open_left == 0 and verified[0]
    print("NOTHING LOST, CHAIN INTACT" if ok else "FAILED: something was lost or the chain is broken")
    return ok


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--processes", type=int, default=8)
    parser.add_argument("--actions", type=int, default=100, help="review actions per process (even)")
    parser.add_argument("--postgres", help="an empty PostgreSQL database URL (default: SQLite)")
    args = parser.parse_args(argv)

    with tempfile.TemporaryDirectory(prefix="ld-review-load-") as folder:
        home = Path(folder) / "home"
        users = [(f"analyst{p}", "analyst", f"Load Analyst {p}") for p in range(args.processes)]
        users += [(f"reviewer{p}", "reviewer", f"Load Reviewer {p}") for p in range(args.processes)]
        people = prepared_home(home, args.postgres, users)
        app = people.pop("_app")
        with running_server(home, args.postgres) as base:
            r = requests.post(f"{base}/api/v1/datasets", files={"file": ("wine.csv", wine_csv())},
                              data={"id_column": "sample"}, headers=people["analyst0"]["headers"], timeout=120)
            r.raise_for_status()
            dataset_id = r.json()["dataset"]["id"]
            samples = [f"W-{i + 1:03d}" for i in range(178)]
            pairs = [({**people[f"analyst{p}"], "dataset_id": dataset_id}, people[f"reviewer{p}"])
                     for p in range(args.processes)]
            print(f"server: gunicorn, 2 workers x 4 threads, {'PostgreSQL' if args.postgres else 'SQLite'}")
            ref_wall, ref_durations = _run(base, pairs, samples, 1, args.actions)
            ref = _summary("reference, 1 process", ref_wall, ref_durations)
            wall, durations = _run(base, pairs, samples, args.processes, args.actions)
            load = _summary(f"load, {args.processes} processes", wall, durations)
        print(f"ratios (load / reference): throughput x{load[0] / ref[0]:.2f}, "
              f"median latency x{load[1] / ref[1]:.2f}, p95 latency x{load[2] / ref[2]:.2f}")
        total = args.actions + args.processes * args.actions
        ok = _check(app, total, total // 2)
        app.extensions["latentdesk.engine"].dispose()
    return 0 if ok else 1


if __name__ == "__main__":
    sys.exit(main())
