"""``beamtap process --workers N`` / ``--scheduler``: many inputs, or long ones, on many cores or a
cluster, through Dask distributed, with the same outputs as a serial run.

Each input's runs (stretches without a gap) are cut into chunks of
``--chunk-s`` of stream. A worker beamforms its chunk with
:func:`~.process.beamform_span`: the engine starts early by its warm-up
(the frame it reads, the band filters and the pending power batch then
hold real input only) with power blocks aligned to the run's start, so its
delay-and-sum output is the serial run's, wherever the join falls (inside a
power block too). It writes its part (power rows as ``.npy``, audio as raw
float32) under ``DIR/.beamtap-parts/``. When an input's chunks are done, one
task stitches its parts in order into the usual outputs and runs detection
and tracking over the stitched rows (their background has a long memory, so
they run once over the whole input, as in a serial run).

Stages that cannot be reproduced by a short warm-up are not cut in time:
with ``[beams] method = "mvdr"`` (the covariance average) an input is one
chunk, so inputs run in parallel but each runs whole.

Workers read the inputs and write the parts where the client sees them: the
paths must be the same on every worker (a shared filesystem).
"""

from __future__ import annotations

import csv
import logging
import os
import shutil
import sys
import time
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from beamtap import outputs as outrules
from beamtap.errors import UsageError
from beamtap.memory import keep_freed_memory
from beamtap.session import MANIFEST
from beamtap.wavfile import WavPatcher, WavWriter

from ..assembly import make_beamformer
from ..config import loads
from .process import PROCESS_OUTPUTS, InputPlan, Outputs, beamform_span, new_counts, plan_input, write_summary
from .progress import Progress

#: The default length of a chunk, seconds of stream.
DEFAULT_CHUNK_S = 60.0
PARTS = ".beamtap-parts"
NEED_EXTRA = "--workers and --scheduler need the cluster extra: pip install 'beamtap[cluster]' (dask[distributed])"


@dataclass(frozen=True)
class Span:
    """Input frames ``own_from`` to ``own_to`` of ``run`` (the ``run_index``-th of its input)."""

    run_index: int
    run: object  # process.Run
    own_from: int
    own_to: int


@dataclass(frozen=True)
class ChunkTask:
    """What a worker needs for one chunk: the config as text, the spans, where to write."""

    config_text: str
    config_where: str
    input_index: int
    chunk_index: int
    spans: tuple
    part_dir: str
    threads: int = 1
    source: str = ""
    audio_path: str | None = None  # the input's audio.wav, made at its final length before the chunks run
    audio_origin: int = 0  # the stream index of its first frame

    def describe(self, fs: float) -> str:
        first, last = self.spans[0], self.spans[-1]
        return f"{self.source}, {first.own_from / fs:.3f}–{last.own_to / fs:.3f} s of stream"


#: Engines a worker process has built, by (config text, where, threads): building one (steering
#: spectra, band filters) costs a good part of a second for a large array, far more than a chunk's
#: warm-up, and every chunk of a campaign asks for the same. Each span starts with a reset.
_ENGINES: dict = {}


def _engine(config_text: str, where: str, threads: int):
    """(config, engine) for a chunk, built once per worker process; adaptive engines are never
    shared (their covariance average is state a reset does not clear), nor is more than one kept."""
    key = (config_text, where, threads)
    if key in _ENGINES:
        return _ENGINES[key]
    if not _ENGINES:
        keep_freed_memory()  # Dask starts workers with MALLOC_TRIM_THRESHOLD_=65536 (see beamtap.memory)
    config = loads(config_text, where)
    bf = make_beamformer(config, threads=threads)
    if config.beams.method == "das":
        for old in _ENGINES.values():
            old[1].close()
        _ENGINES.clear()
        _ENGINES[key] = (config, bf)
    return config, bf


def run_chunk(task: ChunkTask) -> dict:
    """Beamform one chunk into its part folder (runs on a worker); returns its counts."""
    config, bf = _engine(task.config_text, task.config_where, task.threads)
    counts = new_counts()
    parts = []
    patcher = WavPatcher(task.audio_path, len(config.beams.audio_deg)) if task.audio_path else None
    try:
        for k, span in enumerate(task.spans):
            part = Path(task.part_dir) / f"span-{k:03d}"
            part.mkdir(parents=True, exist_ok=True)
            firsts, power = [], []
            at = [span.own_from - task.audio_origin]  # audio.wav frame of the next owned audio frame

            def on_audio(a):
                patcher.write(at[0], a)
                at[0] += len(a)

            beamform_span(bf, span.run, span.own_from, span.own_to, counts, on_audio,
                          lambda n, p: (firsts.append(n), power.append(p)))
            n_bands, n_beams = len(config.beams.bands_hz), len(config.beams.power_deg)
            np.save(part / "firsts.npy", np.concatenate(firsts) if firsts else np.zeros(0, np.int64))
            np.save(part / "power.npy", np.concatenate(power) if power else np.zeros((0, n_bands, n_beams), np.float32))
            parts.append((span.run_index, span.own_from, str(part)))
    except OSError as exc:
        if exc.filename:
            raise
        raise OSError(exc.errno, f"writing {task.audio_path or task.part_dir}: {exc.strerror or exc}") from None
    finally:
        if patcher is not None:
            patcher.close()
        if _ENGINES.get((task.config_text, task.config_where, task.threads), (None, None))[1] is not bf:
            bf.close()
    return {"counts": counts, "parts": parts, "frames": sum(s.own_to - s.own_from for s in task.spans)}


def finish_input(plan: InputPlan, out: str, extra: dict, *chunks: dict) -> None:
    """Stitch an input's power parts, in stream order, into its outputs and ``summary.json`` (runs
    on a worker, after the input's chunks, which wrote their audio into ``audio.wav`` themselves);
    detection and tracking go over the stitched rows."""
    config, bf = _engine(plan.config.text, plan.config.where, 1)
    out = Path(out)
    counts = new_counts()
    for c in chunks:
        for k in ("nan", "clipped", "frames", "power_rows"):
            counts[k] += c["counts"][k]
    parts = sorted(p for c in chunks for p in c["parts"])
    with Outputs(config, bf, out, plan.anchors, audio=False) as outputs:
        for _, _, part in parts:  # in stream order: (run, first owned frame)
            firsts, power = np.load(Path(part) / "firsts.npy"), np.load(Path(part) / "power.npy")
            if len(firsts):
                outputs.write_batch([], [firsts], [power])
    write_summary(out, plan, counts, outputs, bf, extra)
    for _, _, part in parts:
        shutil.rmtree(part, ignore_errors=True)


# ---- the client side ------------------------------------------------------------------------------
def expand_inputs(inputs) -> list[Path]:
    """WAV files and session folders as given; a folder of sessions becomes its sessions, by name."""
    out = []
    for text in inputs:
        p = Path(text)
        if p.is_dir() and not (p / MANIFEST).exists():
            sessions = sorted(q for q in p.iterdir() if q.is_dir() and (q / MANIFEST).exists())
            if not sessions:
                raise UsageError(f"{p}: neither a session (no {MANIFEST}) nor a folder of sessions")
            out += sessions
        elif p.exists():
            out.append(p)
        else:
            raise UsageError(f"{p}: no such file or folder")
    return out


def output_folders(out: Path, inputs: list[Path]) -> list[Path]:
    """``DIR`` for one input; ``DIR/NAME`` per input for several (NAME its file or folder name, made
    unique with ``-2``, ``-3`` ...)."""
    if len(inputs) == 1:
        return [out]
    seen: dict[str, int] = {}
    folders = []
    for p in inputs:
        name = p.name if p.is_dir() else p.stem
        seen[name] = seen.get(name, 0) + 1
        folders.append(out / (name if seen[name] == 1 else f"{name}-{seen[name]}"))
    return folders


def chunk_tasks(plan: InputPlan, input_index: int, chunk_s: float, parts: Path, threads: int,
                audio_path: str | None = None) -> list[ChunkTask]:
    """The chunks of one input: ``chunk_s`` of stream each per run; one for a whole MVDR input.
    ``audio_path``: the input's ``audio.wav`` (see :func:`make_audio_file`), which the chunks fill."""
    config = plan.config
    spans_of = []
    if config.beams.method == "mvdr":
        spans_of.append(tuple(Span(i, run, run.first, run.end) for i, run in enumerate(plan.runs)))
    else:
        step = max(int(round(chunk_s * config.input.samplerate_hz)), 1)
        for i, run in enumerate(plan.runs):
            for lo in range(run.first, run.end, step):
                spans_of.append((Span(i, run, lo, min(lo + step, run.end)),))
    origin = plan.runs[0].first if plan.runs else 0
    return [ChunkTask(config.text, config.where, input_index, k, spans, str(parts / f"{input_index:04d}" / f"{k:05d}"),
                      threads, plan.source, audio_path, origin) for k, spans in enumerate(spans_of)]


def make_audio_file(plan: InputPlan, folder: Path) -> str | None:
    """``folder/audio.wav`` at its final length (sparse silence: gaps stay silent), for the chunks to
    fill; None when there are no audio beams."""
    n_audio = len(plan.config.beams.audio_deg)
    if not n_audio or not plan.runs:
        return None
    path = folder / "audio.wav"
    try:
        w = WavWriter(path, plan.config.input.samplerate_hz, n_audio)
        try:
            w.skip(plan.runs[-1].end - plan.runs[0].first)
        finally:
            w.close(sync=False)
    except OSError as exc:  # a full disk: where and what, in one line
        raise UsageError(f"--out {path}: cannot be made: {exc.strerror or exc}") from None
    return str(path)


def _client(workers: int, scheduler: str | None, scheduler_file: str | None):
    """A Dask client: on a LocalCluster of ``workers`` processes started here, or an existing scheduler."""
    try:
        from dask.distributed import Client, LocalCluster  # noqa: PLC0415
    except ImportError:
        raise UsageError(NEED_EXTRA) from None
    # Dask's own log lines (worker start-up, closing) would bury the progress bar.
    for name in ("distributed", "distributed.scheduler", "distributed.worker", "distributed.nanny"):
        logging.getLogger(name).setLevel(logging.CRITICAL)
    if scheduler or scheduler_file:
        try:
            return Client(scheduler, scheduler_file=scheduler_file, timeout="10s"), None
        except (OSError, TimeoutError, ValueError) as exc:
            where = scheduler or f"--scheduler-file {scheduler_file}"
            raise UsageError(f"--scheduler {where}: cannot reach the Dask scheduler: {exc}") from None
    try:
        import bokeh  # noqa: F401, PLC0415 - the dashboard needs it
        dashboard = "127.0.0.1:0"
    except ImportError:
        dashboard = None
    cluster = LocalCluster(n_workers=workers, threads_per_worker=1, processes=True, dashboard_address=dashboard,
                           host="127.0.0.1", silence_logs=logging.CRITICAL)
    return Client(cluster), cluster


def run(config, inputs, out, workers: int = 1, scheduler: str | None = None, scheduler_file: str | None = None,
        chunk_s: float = DEFAULT_CHUNK_S, threads: int | None = None, allow_mismatch: bool = False,
        start_utc: float | None = None, overwrite: bool = False, warn=None, say=None) -> int:
    """Process ``inputs`` into ``out`` on Dask; returns the exit status (1 when any input failed)."""
    warn = warn or (lambda line: None)
    say = say or (lambda line: print(line, flush=True))
    if not (chunk_s > 0 and np.isfinite(chunk_s)):
        raise UsageError(f"--chunk-s {chunk_s:g}: expected a positive number of seconds")
    paths = expand_inputs(inputs)
    folders = output_folders(Path(out), paths)
    plans = [plan_input(config, p, allow_mismatch, warn, start_utc) for p in paths]
    for f in folders:
        outrules.check_folder(f, overwrite, PROCESS_OUTPUTS)
    parts = Path(out) / PARTS
    threads = threads or 1
    for f in folders:
        f.mkdir(parents=True, exist_ok=True)
    tasks = [chunk_tasks(plan, i, chunk_s, parts, threads, make_audio_file(plan, folders[i]))
             for i, plan in enumerate(plans)]
    client, cluster = _client(workers, scheduler, scheduler_file)
    status = ["queued"] * len(plans)
    errors: list[str] = []
    futures: list = []
    try:
        if _has_dashboard(client, cluster):
            say(f"Dask dashboard: {client.dashboard_link}")
        n_workers = len(client.scheduler_info().get("workers", {}))
        say(f"process: {len(plans)} input(s), {sum(len(t) for t in tasks)} chunk(s) on {n_workers} Dask worker(s)")
        _run_tasks(client, plans, tasks, folders, n_workers, chunk_s, threads, errors, status, futures)
    except KeyboardInterrupt:
        client.cancel(futures)
        say("process: cancelled; the outputs of unfinished inputs are incomplete")
        status[:] = ["cancelled" if s != "done" else s for s in status]
        return 130
    finally:
        client.close()
        if cluster is not None:
            cluster.close()
        shutil.rmtree(parts, ignore_errors=True)
        if len(plans) > 1:
            _write_index(Path(out), plans, folders, status)
    for line in errors:
        sys.stderr.write(f"beamtap process: error: {line}\n")
    return 1 if errors else 0


def _has_dashboard(client, cluster) -> bool:
    try:
        return bool(client.dashboard_link) and (cluster is None or cluster.dashboard_link is not None)
    except Exception:  # no dashboard (bokeh missing): Dask raises on the link
        return False


def _run_tasks(client, plans, tasks, folders, n_workers, chunk_s, threads, errors, status, futures) -> None:
    """Submit every chunk and every input's stitching; follow them to the end (``status`` and
    ``errors`` filled in, ``futures`` holds what was submitted, for a cancel)."""
    from dask.distributed import as_completed  # noqa: PLC0415

    fs = {i: p.config.input.samplerate_hz for i, p in enumerate(plans)}
    total_s = sum(p.frames / fs[i] for i, p in enumerate(plans))
    n_chunks = sum(len(t) for t in tasks)
    bar = Progress(int(round(total_s * 1000)), 1000.0, min_s=0.0)
    meta = {}
    tag = f"{os.getpid()}-{time.monotonic_ns()}"
    for i, (plan, chunk_list) in enumerate(zip(plans, tasks)):
        chunk_futures = []
        for t in chunk_list:
            f = client.submit(run_chunk, t, key=f"beamtap-chunk-{i:04d}-{t.chunk_index:05d}-{tag}", retries=1,
                              pure=False)
            meta[f.key] = ("chunk", i, t)
            chunk_futures.append(f)
        extra = {"engine_threads": threads, "workers": n_workers, "chunk_s": chunk_s, "chunks": len(chunk_list)}
        fin = client.submit(finish_input, plan, str(folders[i]), extra, *chunk_futures,
                            key=f"beamtap-finish-{i:04d}-{tag}", retries=1, pure=False)
        meta[fin.key] = ("finish", i, None)
        futures += chunk_futures + [fin]
        status[i] = "running"
    done_s, chunks_done = 0.0, 0
    for future in as_completed(futures):
        kind, i, task = meta[future.key]
        if future.status == "error":
            exc = future.exception()
            if kind == "chunk":
                errors.append(f"{task.describe(fs[i])}: {type(exc).__name__}: {exc} (tried twice)")
                status[i] = "failed"
            elif status[i] != "failed":
                errors.append(f"{plans[i].source}: stitching the outputs: {type(exc).__name__}: {exc}")
                status[i] = "failed"
        elif future.status == "cancelled":
            status[i] = "cancelled"
        elif kind == "chunk":
            chunks_done += 1
            done_s += future.result()["frames"] / fs[i]
            bar.update(int(round(done_s * 1000)), f"{chunks_done}/{n_chunks} chunks")
        else:
            status[i] = "done"


def run_serial(config, inputs, out, threads=None, allow_mismatch=False, start_utc=None, overwrite=False,
               warn=None) -> list[dict]:
    """``--workers 1``: each input in turn on this machine (the engine on ``threads``, every core by
    default); several inputs go into folders of their own with ``index.csv``. Returns (output folder,
    summary) per input."""
    from ..engine.beamformer import KERNELS_MISSING  # noqa: PLC0415
    from .process import process_plan  # noqa: PLC0415

    if KERNELS_MISSING and warn is not None:
        warn(KERNELS_MISSING)
    paths = expand_inputs(inputs)
    folders = output_folders(Path(out), paths)
    plans = [plan_input(config, p, allow_mismatch, warn, start_utc) for p in paths]  # every input checked first
    for f in folders:
        outrules.check_folder(f, overwrite, PROCESS_OUTPUTS)
    results, status = [], ["queued"] * len(paths)
    engines: dict = {}  # one engine per distinct config: building one costs more than a short input
    try:
        for k, (plan, f) in enumerate(zip(plans, folders)):
            status[k] = "failed"
            key = (plan.config.text, plan.config.where)
            if key not in engines:
                engines[key] = make_beamformer(plan.config,
                                               threads=plan.config.engine_threads(offline=True, override=threads))
            results.append((f, process_plan(plan, f, engines[key])))
            status[k] = "done"
    finally:
        for bf in engines.values():
            bf.close()
        if len(paths) > 1:
            _write_index(Path(out), plans, folders, status)
    return results


def _write_index(out: Path, plans, folders, status) -> None:
    with open(out / "index.csv", "w", newline="", encoding="utf-8") as f:
        w = csv.writer(f)
        w.writerow(["input", "output", "frames", "seconds", "status"])
        for plan, folder, st in zip(plans, folders, status):
            w.writerow([plan.source, str(folder), plan.frames, f"{plan.frames / plan.config.input.samplerate_hz:.3f}",
                        st])
