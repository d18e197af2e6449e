"""Running a campaign's cases on Dask (dask.distributed): an embedded LocalCluster of
process workers by default, or an existing scheduler by its address; the same code
path in both. One case is one task; each finished row is appended to the campaign's
journal (cases.jsonl) as it arrives, so an interrupted campaign resumes with only the
cases that are missing.

A worker that dies mid-case is the scheduler's to handle: it runs the case again on
another worker (up to its ``allowed-failures``). A case that still has no row after
that is left missing, and a later ``--resume`` runs it again.

Dask is imported only here, and only when a campaign runs, so ``plantrig --help`` and
``plantrig check`` stay light.
"""

from __future__ import annotations

import contextlib
import json
import logging
import math
import os
import sys
import time
import uuid
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from plantrig._campaign_case import ERROR, FAILED, run_batch
from plantrig._campaign_out import read_journal
from plantrig.sim import Case

SHOWN_FAILURES = 20
MAX_BATCH = 32
CLOSE_TIMEOUT_S = 20


@dataclass
class Session:
    """What one `plantrig campaign` invocation did."""

    where: str = ""
    dashboard: str = ""
    started_cases: int = 0
    finished_cases: int = 0
    lost: list[str] = field(default_factory=list)     # cases with no row (worker deaths)
    interrupted: bool = False
    cluster_start_s: float = 0.0
    wall_s: float = 0.0
    case_ticks: int = 0

    def as_dict(self) -> dict[str, Any]:
        return {"where": self.where, "dashboard": self.dashboard,
                "cases_run": self.finished_cases, "cases_lost": self.lost,
                "interrupted": self.interrupted,
                "cluster_start_s": round(self.cluster_start_s, 3),
                "wall_s": round(self.wall_s, 3), "case_ticks": self.case_ticks,
                "case_ticks_per_s": round(self.case_ticks / self.wall_s, 1)
                if self.wall_s > 0 else None}


class SchedulerUnreachable(RuntimeError):
    """The scheduler named by --cluster did not answer."""


def run_cases(cases: list[Case], journal: Path, *, cluster: str | None, workers: int,
              progress: bool = True) -> Session:
    """Run every case of ``cases`` without a row in ``journal``; append each row."""
    done = read_journal(journal)
    todo = [c for c in cases if c.case_id not in done]
    session = Session()
    if not todo:
        return session
    from dask.distributed import Client, as_completed

    t0 = time.perf_counter()
    local = None
    try:
        if cluster:
            try:
                client = Client(cluster, timeout="15s")
            except (OSError, TimeoutError) as exc:
                raise SchedulerUnreachable(f"cannot reach the Dask scheduler at {cluster}: "
                                           f"{exc}") from None
            info = client.scheduler_info()
            session.where = f"Dask scheduler {cluster} ({len(info.get('workers', {}))} workers)"
            if "dashboard" in info.get("services", {}):
                session.dashboard = client.dashboard_link
        else:
            local = _local_cluster(workers)
            client = Client(local)
            session.where = f"local Dask cluster, {workers} worker process(es)"
    except KeyboardInterrupt:
        session.interrupted = True
        if local is not None:
            local.close(timeout=CLOSE_TIMEOUT_S)
        return session
    session.cluster_start_s = time.perf_counter() - t0
    print(f"running {len(todo)} of {len(cases)} cases on {session.where}", file=sys.stderr)
    if session.dashboard:
        print(f"dask dashboard: {session.dashboard}", file=sys.stderr)
    token = uuid.uuid4().hex[:8]
    futures: list[Any] = []
    bar = _progress(len(cases), len(done), progress)
    counts = {FAILED: sum(r["status"] == FAILED for r in done.values()),
              ERROR: sum(r["status"] == ERROR for r in done.values())}
    shown = 0
    threads = _threads(client)
    t1 = time.perf_counter()
    try:
        batches = _batches(todo, threads)
        futures = [client.submit(run_batch, batch,
                                 key=f"plantrig-cases-{batch[0].case_id}-{len(batch)}-{token}",
                                 pure=False, priority=-batch[0].index) for batch in batches]
        session.started_cases = len(todo)
        by_key = {f.key: batch for f, batch in zip(futures, batches, strict=True)}
        with open(journal, "a", encoding="utf-8") as out:
            for future in as_completed(futures):
                batch = by_key[future.key]
                if future.status != "finished":   # the scheduler gave up (workers died)
                    session.lost.extend(case.case_id for case in batch)
                    bar.write(f"LOST   cases {', '.join(c.case_id for c in batch)}: "
                              f"{future.exception()!r}; run --resume")
                    continue
                for row in future.result():
                    out.write(json.dumps(row) + "\n")
                    session.finished_cases += 1
                    session.case_ticks += int(row["ticks"])
                    if row["status"] in counts:
                        counts[row["status"]] += 1
                        if shown < SHOWN_FAILURES:
                            shown += 1
                            bar.write(_failure_line(row))
                    bar.update(1)
                out.flush()
                os.fsync(out.fileno())
                running = min(len(todo) - session.finished_cases - len(session.lost),
                              threads)
                bar.set_postfix_str(f"failed {counts[FAILED]}, errors {counts[ERROR]}, "
                                    f"running {running}")
    except KeyboardInterrupt:
        session.interrupted = True
    finally:
        session.wall_s = time.perf_counter() - t1
        bar.close()
        with contextlib.suppress(Exception, KeyboardInterrupt):
            if futures:
                client.cancel(futures)
            client.close(timeout=CLOSE_TIMEOUT_S)
        with contextlib.suppress(Exception, KeyboardInterrupt):
            if local is not None:
                local.close(timeout=CLOSE_TIMEOUT_S)
    return session


def _batches(todo: list[Case], threads: int) -> list[list[Case]]:
    """The cases in batches that shrink towards the end (each a half of an even share
    of what is left per worker thread, at most MAX_BATCH, at least 1).

    A Dask task costs the scheduler and this process milliseconds, as much as a short
    case on a 2-core machine, so cases go in batches; but equal batches end unevenly:
    with 8 batches of 25 cases one worker sat idle for 0.3-0.4 s of a 7 s campaign while
    the other finished its last batch. Shrinking batches end within about a case."""
    batches, i = [], 0
    while i < len(todo):
        size = max(1, min(MAX_BATCH, math.ceil((len(todo) - i) / (2 * max(threads, 1)))))
        batches.append(todo[i:i + size])
        i += size
    return batches


def _local_cluster(workers: int) -> Any:
    """An embedded cluster of ``workers`` single-thread worker processes.

    On Linux the workers are forked from this process, which has already imported
    Dask, numpy and the engine: a spawned worker starts a fresh interpreter and imports
    them again (0.9 s to start two, 0.2 s more at their first case, 0.26 s to close, on
    the 2-core bench machine; forked: 0.17, 0.03 and 0.02 s). Dask forks from its
    event-loop thread while this one waits for it. A worker the nanny restarts later is
    spawned (the setting holds only while the cluster starts).

    The workers' statistical profiler is off: this cluster has no dashboard to show
    its samples, and the worker keeps an hour of them, so its RSS grew about 7 MB
    over 300 cases with it and about 3 MB without (one worker, 10-case batches).

    Dask's own log lines are kept to CRITICAL here (the workers, forked, inherit it):
    the campaign says in its words what a user needs (cases lost, cases that raised,
    --resume), and after Ctrl-C or SIGTERM a worker still busy with a case when the
    scheduler in this process closes logs its failed heartbeat as an ERROR with a
    traceback, noise that reads like a crash (seen twice in about twenty interrupted runs).
    """
    import dask
    from dask.distributed import LocalCluster

    method = "fork" if sys.platform == "linux" else "spawn"
    with dask.config.set({"distributed.worker.multiprocessing-method": method,
                          "distributed.worker.profile.enabled": False}):
        return LocalCluster(n_workers=workers, threads_per_worker=1, processes=True,
                            dashboard_address=None, silence_logs=logging.CRITICAL)


def _failure_line(row: dict[str, Any]) -> str:
    """One line for a failed or erroring case, as the progress display shows it."""
    what = row["error"] or "; ".join(
        [f"ended {row['outcome']}: {row['reason']}"] * (row["outcome"] != "completed")
        + [f"FAIL {v['name']}" for v in row["verdicts"] if not v["passed"]])
    return (f"{row['status'].upper():<6} case {row['case_id']} "
            f"({row['rig']}/{row['scenario'] or '-'} {row['variation']}): {what}")


def _threads(client: Any) -> int:
    try:
        return sum(w.get("nthreads", 1) for w in client.scheduler_info()["workers"].values())
    except Exception:  # progress display only
        return 0


def _progress(total: int, initial: int, enabled: bool) -> Any:
    from tqdm import tqdm
    return tqdm(total=total, initial=initial, unit="case", file=sys.stderr,
                disable=not enabled, dynamic_ncols=True, smoothing=0.1)
