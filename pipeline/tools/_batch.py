"""``downlink batch``: decode many recordings (a mission archive) in parallel on Dask.

One recording is one task: it runs the ordinary streaming decode in one worker process, in constant
memory, so the archive scales with the number of workers.  Scheduling is Dask's
(``dask.distributed``): a local cluster by default, or any scheduler address to scale out across
machines.  The project never schedules work itself.

Each recording gets its own output folder: its path relative to the common parent folder of all the
recordings, without the extension (``a/pass.sigmf-meta`` and ``b/pass.sigmf-meta`` decode into
``OUT/a/pass/`` and ``OUT/b/pass/``), written atomically by the ordinary decode; ``OUT/index.json`` lists
every recording with its status.  A recording that fails is reported and does not stop the others;
re-running skips recordings whose folder is complete.  Dask's own logging is shown only with ``-v``.
"""

from __future__ import annotations

import json
import logging
import os
import sys
import time
from pathlib import Path

from pipeline.errors import OutputError
from pipeline.profile import LinkProfile

__all__ = ["decode_one", "output_name", "output_names", "run_batch"]

_EXTENSIONS = (".sigmf-meta", ".sigmf-data", ".sigmf", ".wav", ".cf32", ".ci16", ".ci8", ".cu8")


def output_name(recording: str) -> str:
    """Folder name for a recording: its file name without the SigMF / raw extension."""
    name = Path(recording).name
    for ext in _EXTENSIONS:
        if name.endswith(ext):
            return name[: -len(ext)]
    return Path(name).stem


def output_names(recordings: list[str]) -> dict[str, str]:
    """Output folder (relative, ``/``-separated) for each recording: its path below the recordings'
    common parent folder, without the extension.

    Raises
    ------
    OutputError
        When two different recordings would still share a folder (``x.wav`` and ``x.cf32`` side by side).

    Examples
    --------
    >>> output_names(["/d/a/pass.sigmf-meta", "/d/b/pass.sigmf-meta"])
    {'/d/a/pass.sigmf-meta': 'a/pass', '/d/b/pass.sigmf-meta': 'b/pass'}
    >>> output_names(["/d/a/pass.sigmf-meta"])
    {'/d/a/pass.sigmf-meta': 'pass'}
    """
    paths = {rec: Path(os.path.abspath(rec)) for rec in recordings}
    parent = Path(os.path.commonpath([str(p.parent) for p in paths.values()])) if paths else Path(".")
    names: dict[str, str] = {}
    owner: dict[str, Path] = {}
    for rec, path in paths.items():
        rel = path.parent.relative_to(parent) / output_name(str(path))
        name = rel.as_posix()
        # x.sigmf-meta and x.sigmf-data are one recording; any other two files are two
        base = path.with_name(output_name(str(path))) if path.suffix in (".sigmf-meta", ".sigmf-data") else path
        if name in owner and owner[name] != base:
            raise OutputError(f"{rec}: two recordings would share the output folder {name}; rename one of them")
        owner[name] = base
        names[rec] = name
    return names


def decode_one(recording: str, profile: LinkProfile, out_dir: str) -> dict:
    """Decode one recording into ``out_dir``; never raises (the error goes into the result)."""
    from pipeline.chain import decode
    from pipeline.errors import DownlinkError

    t0 = time.perf_counter()
    try:
        s = decode(recording, profile, out_dir)
    except DownlinkError as exc:
        return {"recording": recording, "status": "failed", "error": str(exc)}
    except Exception as exc:  # a bug in one recording must not stop the archive
        return {"recording": recording, "status": "failed", "error": f"internal error: {type(exc).__name__}: {exc}"}
    return {"recording": recording, "status": "decoded", "out": out_dir, "frames": s.frames,
            "frames_ok": s.frames_ok, "packets": s.packets, "duration_s": s.duration_s,
            "elapsed_s": round(time.perf_counter() - t0, 3)}


def _is_complete(folder: Path) -> bool:
    return (folder / "report.json").is_file() and (folder / "packets.jsonl").is_file()


def run_batch(recordings: list[str], profile: LinkProfile, profile_path: str, out: str, *,
              scheduler: str | None = None, workers: int | None = None, quiet: bool = False,
              verbose: bool = False) -> int:
    """Decode ``recordings`` with Dask; returns 0 when every recording decoded, 1 otherwise.

    Progress is one line per recording on stderr (none with ``quiet``); Dask's scheduler and worker
    logging only with ``verbose``.
    """
    try:
        from dask.distributed import Client, LocalCluster, as_completed
    except ImportError:  # pragma: no cover - dask is a declared dependency of [test] and [dask]
        raise OutputError("downlink batch needs dask.distributed: pip install \".[dask]\" "
                          "(or pip install \"downlink[dask]\")") from None
    recordings = list(dict.fromkeys(recordings))  # a recording named twice is decoded once
    names = output_names(recordings)  # refuses collisions before anything is created
    out_dir = Path(out)
    created = not out_dir.exists()
    try:
        out_dir.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise OutputError(f"{out_dir}: cannot create output folder ({exc.strerror})") from None
    try:
        return _run(recordings, names, profile, profile_path, out_dir, scheduler=scheduler, workers=workers,
                    quiet=quiet, verbose=verbose, dask=(Client, LocalCluster, as_completed))
    except BaseException:
        if created and out_dir.is_dir() and not any(out_dir.iterdir()):
            out_dir.rmdir()  # nothing was decoded: leave nothing behind
        raise


def _run(recordings, names, profile, profile_path, out_dir: Path, *, scheduler, workers, quiet, verbose,
         dask) -> int:
    Client, LocalCluster, as_completed = dask
    results: dict[str, dict] = {}
    todo = []
    for rec in recordings:
        name = names[rec]
        if _is_complete(out_dir / name):
            results[rec] = {"recording": rec, "status": "skipped", "out": str(out_dir / name),
                            "note": "output already complete"}
        else:
            todo.append(rec)
    level = logging.INFO if verbose else logging.ERROR
    for name in ("distributed", "dask"):
        logging.getLogger(name).setLevel(level)
    if todo:
        if scheduler:
            client = Client(scheduler)
            cluster = None
        else:
            n = workers or os.cpu_count() or 1
            cluster = LocalCluster(n_workers=min(n, len(todo)), threads_per_worker=1, processes=True,
                                   dashboard_address=None, silence_logs=level)
            client = Client(cluster)
        done = 0
        try:
            futures = {client.submit(decode_one, rec, profile, str(out_dir / names[rec]), pure=False): rec
                       for rec in todo}
            for fut in as_completed(futures):
                rec = futures[fut]
                try:
                    res = fut.result()
                except Exception as exc:  # a worker died
                    res = {"recording": rec, "status": "failed", "error": f"worker failed: {exc}"}
                results[rec] = res
                done += 1
                if not quiet:
                    tail = f"{res.get('packets', 0)} packets" if res["status"] == "decoded" else res.get("error", "")
                    print(f"[{done}/{len(todo)}] {res['status']:>8}  {rec}  {tail}", file=sys.stderr, flush=True)
        finally:
            client.close()
            if cluster is not None:
                cluster.close()
    index = {"profile": profile_path, "recordings": [results[r] for r in recordings]}
    tmp = out_dir / ".index.json.partial"
    tmp.write_text(json.dumps(index, indent=2) + "\n")
    os.replace(tmp, out_dir / "index.json")
    failed = sum(1 for r in results.values() if r["status"] == "failed")
    if not quiet:
        done = sum(1 for r in results.values() if r["status"] == "decoded")
        skipped = sum(1 for r in results.values() if r["status"] == "skipped")
        print(f"batch: {done} decoded, {skipped} skipped, {failed} failed; index {out_dir / 'index.json'}",
              file=sys.stderr)
    return 0 if failed == 0 else 1
