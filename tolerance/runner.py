"""Chunked, parallel evaluation of a study.

A run is cut into chunks of consecutive samples. Each chunk draws its own samples (see
:mod:`tolerance.sampling`: the numbers depend only on the seed and the sample index), evaluates
the stage on the whole chunk at once, applies the criteria and, when an output folder is given,
writes one Parquet file per chunk (to a temporary name, then renamed, so a killed run never
leaves a half-written chunk). Chunks run through ``joblib.Parallel``; the results come back in
submission order, and every figure of the summary is computed afterwards from the full columns
in sample order, so the summary does not depend on the number of workers or the chunk size.
"""

from __future__ import annotations

import contextlib
import errno
import functools
import hashlib
import json
import re
import signal
import sys
import threading
import time
from dataclasses import dataclass, field
from pathlib import Path

from typing import TYPE_CHECKING

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

from tolerance.files import TMP_SUFFIX, atomic_path
from tolerance.protocol import Criterion, Parameter
from tolerance.sampling import condition_on_pins, draw

if TYPE_CHECKING:  # pandas is imported where a frame is built: a worker writing chunks
    import pandas as pd  # never needs it, and it costs a worker's start a third of a second

CHUNK_PREFIX = "part-"
_CHUNK_NAME = re.compile(re.escape(CHUNK_PREFIX) + r"\d{6,}\.parquet")


@dataclass(frozen=True)
class Override:
    """Change of one parameter for what-if and value-choice runs.

    ``kind`` is ``"pin"`` (every sample takes ``value``) or ``"scale"`` (every sample is
    multiplied by ``value``: a part moved to another nominal keeps its relative deviation, so the
    candidates share their random numbers).
    """

    kind: str
    value: float


@dataclass(frozen=True)
class RunSpec:
    """Everything a worker needs to evaluate a chunk (picklable)."""

    stage: object
    parameters: tuple[Parameter, ...]
    criteria: tuple[Criterion, ...]
    correlation: np.ndarray | None
    sampler: str
    seed: int
    samples: int
    study_hash: str
    overrides: tuple[tuple[str, Override], ...] = ()
    code: str = ""  # digest of the code that computes the samples (code_digest)

    @property
    def signature(self) -> dict:
        return {
            "study_hash": self.study_hash,
            "seed": self.seed,
            "samples": self.samples,
            "sampler": self.sampler,
            "overrides": [[n, o.kind, o.value] for n, o in self.overrides],
            "code": self.code,
        }


@functools.lru_cache(maxsize=1)
def code_digest() -> str:
    """Digest of every source and library file of the tool (``tolerance`` and its models):
    chunks stamped with another digest were computed by other code, and a resumed run does
    not mix them with its own."""
    import tolerance
    import tolerance.models

    digest = hashlib.sha256(tolerance.__version__.encode())
    for top in (Path(tolerance.__file__).parent, *map(Path, tolerance.models.__path__)):
        for path in sorted(top.rglob("*")):
            if path.suffix in (".py", ".toml") and "__pycache__" not in path.parts:
                digest.update(path.relative_to(top).as_posix().encode())
                digest.update(path.read_bytes())
    return digest.hexdigest()[:16]


#: with a stop rule, the rule is checked at every multiple of this many samples
CHECK_EVERY = 32_768


def chunk_ranges(total: int, chunk_size: int, align: int | None = None
                 ) -> list[tuple[int, int, int]]:
    """(index, start, stop) of every chunk; with ``align`` no chunk crosses a multiple of it."""
    edges = set(range(0, total, chunk_size))
    if align:
        edges |= set(range(0, total, align))
    starts = sorted(edges)
    stops = starts[1:] + [total]
    return [(i, s, e) for i, (s, e) in enumerate(zip(starts, stops))]


def balanced_chunk_size(samples: int, chunk_size: int, jobs: int) -> int:
    """Chunk size that gives every one of ``jobs`` workers the same work.

    The fewest chunks that is a multiple of ``jobs`` and keeps every chunk within
    ``chunk_size``, all of one size (the last one shorter by less than the number of
    chunks): a
    20,000-sample run on two workers is two chunks of 10,000, not 16,384 and 3,616, one
    worker waiting for the other. One worker keeps ``chunk_size``. Results never depend on
    the chunk size (every figure is computed from whole columns in sample order).
    """
    if jobs <= 1 or samples <= 0:
        return chunk_size
    n = jobs * -(-samples // (chunk_size * jobs))
    return max(1, -(-samples // n))


def resumable_chunk_size(folder: Path, spec: RunSpec) -> int | None:
    """The chunk size of the run that left ``folder``: the length of its first chunk when
    that chunk belongs to this very run (a resumed run keeps that plan, whatever its
    number of workers, so no finished chunk is computed again); None otherwise."""
    split = _split_stamp(_chunk_path(folder, 0))
    if split is None:
        return None
    stored, start, stop = split
    if stored != spec.signature or start != 0 or not isinstance(stop, int) or stop < 1:
        return None
    return stop


def _split_stamp(path: Path) -> tuple[dict, object, object] | None:
    """A chunk's stamp as its run's signature, start and stop (None: no readable chunk)."""
    stored = _chunk_stamp(path)
    if stored is None:
        return None
    return stored, stored.pop("start", None), stored.pop("stop", None)


def chunks_fit_plan(folder: Path, spec: RunSpec, chunk_size: int, align: int | None) -> bool:
    """True when every chunk of this very run in ``folder`` lies where the plan of
    ``chunk_size`` (cut at every ``align`` samples) puts it: a run planned that way, such as
    an interrupted ``--target-ci`` run, is continued, one planned without the cuts is not."""
    plan = {i: (s, e) for i, s, e in chunk_ranges(spec.samples, chunk_size, align)}
    for path in chunk_files(folder):
        split = _split_stamp(path)
        if split is None:
            continue  # unreadable: computed again
        stored, start, stop = split
        if stored != spec.signature:
            continue  # another run's: other_run refused it, or --force replaced it
        if plan.get(int(path.stem[len(CHUNK_PREFIX):])) != (start, stop):
            return False
    return True


#: how a difference of the signature's entries is told when a resumed run is refused
_OTHER = {"study_hash": "another version of the study", "overrides": "other pinned values",
          "code": "another version of the tool (its results are not mixed with this one's)"}


def other_run(folder: Path, spec: RunSpec) -> str | None:
    """How the run whose chunks ``folder`` holds differs from ``spec`` (``"seed 21, not
    22"``), or None when every readable chunk belongs to this very run (or there is none).
    A resumed run continues only the same run, so it never replaces another's results."""
    for path in chunk_files(folder):
        split = _split_stamp(path)
        if split is None:
            continue  # unreadable: recomputed like a missing chunk
        stored = split[0]
        mine = spec.signature
        differ = [key for key in mine if stored.get(key) != mine[key]]
        if len(differ) > 1 and "study_hash" in differ:
            differ.remove("study_hash")  # the hash covers the study's [run] settings too
        if not differ:
            continue
        return "; ".join(_OTHER.get(key) or f"{key} {stored.get(key)}, not {mine[key]}"
                         for key in differ)
    return None


def criterion_column(name: str) -> str:
    return f"pass.{name}"


def chunk_columns(spec: RunSpec, start: int, stop: int) -> dict[str, np.ndarray]:
    """Draw, evaluate and judge samples ``start:stop``: one array per column (sample index,
    parameters, metrics, ``converged``, a ``pass.<criterion>`` column per criterion and
    ``pass``), one row per sample."""
    u, values = draw(spec.parameters, spec.correlation, spec.sampler, spec.seed, spec.samples,
                     start, stop)
    # a pinned parameter's correlated partners follow it (their conditional distribution)
    values.update(condition_on_pins(spec.parameters, spec.correlation, u,
                                    {n: o.value for n, o in spec.overrides if o.kind == "pin"}))
    for name, override in spec.overrides:
        if override.kind == "pin":
            values[name] = np.full(stop - start, override.value)
        else:
            values[name] = values[name] * override.value
    with np.errstate(all="ignore"):
        result = spec.stage.evaluate(values)
    converged = np.asarray(result.pop("converged"), dtype=bool)
    columns: dict[str, np.ndarray] = {"sample": np.arange(start, stop, dtype=np.int64)}
    columns.update(values)
    for name in spec.stage.metrics:
        col = np.asarray(result[name], dtype=float)
        columns[name] = np.where(converged, col, np.nan)
    columns["converged"] = converged
    all_pass = converged.copy()
    for c in spec.criteria:
        ok = converged & c.passes(columns[c.metric])
        columns[criterion_column(c.name)] = ok
        all_pass &= ok
    columns["pass"] = all_pass
    return columns


def evaluate_chunk(spec: RunSpec, start: int, stop: int) -> pd.DataFrame:
    """Draw, evaluate and judge samples ``start:stop``; one row per sample
    (:func:`chunk_columns` as a frame)."""
    import pandas as pd

    return pd.DataFrame(chunk_columns(spec, start, stop))


def _chunk_path(folder: Path, index: int) -> Path:
    return folder / f"{CHUNK_PREFIX}{index:06d}.parquet"


def _arrow_column(values: np.ndarray) -> pa.Array:
    """A numpy column as an Arrow array, built from its buffers: ``pa.array`` and
    ``pa.table`` import pandas to check what they were given, a third of a second of every
    worker's start."""
    v = np.ascontiguousarray(values)
    if v.dtype == np.bool_:
        bits = np.packbits(v, bitorder="little")  # Arrow's booleans are a bitmap, LSB first
        return pa.Array.from_buffers(pa.bool_(), v.size, [None, pa.py_buffer(bits)])
    return pa.Array.from_buffers(pa.from_numpy_dtype(v.dtype), v.size, [None, pa.py_buffer(v)])


def _write_chunk(columns: dict[str, np.ndarray], path: Path, signature: dict, start: int,
                 stop: int) -> None:
    table = pa.Table.from_arrays([_arrow_column(v) for v in columns.values()],
                                 names=list(columns))
    meta = {b"tolerance": json.dumps({**signature, "start": start, "stop": stop}).encode()}
    table = table.replace_schema_metadata(meta)
    with atomic_path(path) as tmp:
        # a CRC per page: a flipped bit in a chunk is an error when it is read, not a
        # silently different sample (a footer stamp says only which run wrote the file)
        pq.write_table(table, tmp, write_page_checksum=True)


def _chunk_stamp(path: Path) -> dict | None:
    """The run signature and sample range a chunk file was written with (None: no file, or
    not a readable chunk)."""
    if not path.is_file():
        return None
    try:
        meta = pq.read_schema(path).metadata or {}
        stored = json.loads(meta.get(b"tolerance", b"{}"))
    except (OSError, ValueError, pa.ArrowException):
        return None
    return stored if isinstance(stored, dict) else None


def chunk_is_complete(path: Path, signature: dict, start: int, stop: int) -> bool:
    """True when ``path`` holds this chunk of this very run (same study, seed, plan), whole
    and readable: a file whose footer is intact but whose data is damaged is computed again
    (kept, it failed every later read, and every resume kept it)."""
    if _chunk_stamp(path) != {**signature, "start": start, "stop": stop}:
        return False
    try:
        with pq.ParquetFile(path, page_checksum_verification=True) as f:
            return f.read(use_threads=False).num_rows == stop - start
    except (OSError, ValueError, pa.ArrowException):
        return False


def run_chunk_to_file(spec: RunSpec, index: int, start: int, stop: int, folder: str) -> int:
    """Worker task: evaluate a chunk and write it; returns the number of samples."""
    columns = chunk_columns(spec, start, stop)
    _write_chunk(columns, _chunk_path(Path(folder), index), spec.signature, start, stop)
    return stop - start


@dataclass
class Progress:
    total: int
    enabled: bool
    done: int = 0
    started: float = field(default_factory=time.perf_counter)

    def advance(self, n: int) -> None:
        self.done += n
        if not self.enabled:
            return
        frac = self.done / self.total
        width = 30
        bar = "#" * int(width * frac) + "-" * (width - int(width * frac))
        rate = self.done / max(time.perf_counter() - self.started, 1e-9)
        sys.stderr.write(f"\r[{bar}] {100 * frac:5.1f} %  {self.done}/{self.total} samples"
                         f"  {rate:,.0f}/s")
        if self.done >= self.total:
            sys.stderr.write("\n")
        sys.stderr.flush()


class Terminated(KeyboardInterrupt):
    """SIGTERM during a run's chunks (a batch system's time limit, ``timeout``), handled as
    an interrupt: the workers are stopped with the run, the finished chunks kept."""


class InterruptGuard:
    """Ctrl-C (SIGINT) and SIGTERM during a run's chunks, kept until the run has seen them.

    Python turns SIGINT into KeyboardInterrupt in whatever code runs next, and an exception
    raised inside a finalizer (``__del__``, a weakref callback) is ignored there, only
    reported (Python documentation, signal module, "Handlers and exceptions"): a Ctrl-C that
    lands in one is lost and the run goes on to the end. While the guard is on, SIGINT still
    raises at once, as Python's own handler does, and is also remembered; ``check()``, called
    after every chunk and once the chunks are done, raises it again if it went missing.
    SIGTERM, whose default ends the process at once and leaves its worker processes behind
    (idle, holding the command's output open until their idle timeout), raises
    :class:`Terminated` the same way, so the workers are stopped with the run. The guard
    takes a signal only where its default handler holds it, in the main thread (a caller
    that ignores or handles a signal itself keeps it), and gives it back on exit.
    """

    _DEFAULTS = {signal.SIGINT: signal.default_int_handler, signal.SIGTERM: signal.SIG_DFL}

    def __init__(self):
        self.interrupted: int | None = None
        self._previous: dict = {}

    def __enter__(self):
        if threading.current_thread() is threading.main_thread():
            for signum, default in self._DEFAULTS.items():
                if signal.getsignal(signum) is default:
                    self._previous[signum] = signal.signal(signum, self._handle)
        return self

    def _handle(self, signum, frame):
        self.interrupted = signum
        self.check()

    def check(self) -> None:
        if self.interrupted == signal.SIGTERM:
            raise Terminated
        if self.interrupted is not None:
            raise KeyboardInterrupt

    def __exit__(self, *exc) -> None:
        for signum, previous in self._previous.items():
            signal.signal(signum, previous)


def execute(spec: RunSpec, chunk_size: int, jobs: int = 1, folder: Path | None = None,
            progress: bool = False, resume: bool = False, backend: str = "loky",
            scheduler: str | None = None, stop_rule=None) -> pd.DataFrame | None:
    """Evaluate every chunk; return the samples (``folder`` None) or write them to ``folder``.

    With ``resume`` the chunks already in ``folder`` that belong to this very run are kept.
    With ``stop_rule`` the chunks run in rounds (two per worker) and the run stops after the
    first round for which ``stop_rule(column)`` is true, ``column(name)`` giving the samples
    evaluated so far; the chunks kept are always a prefix of the plan, so the result depends
    only on the seed and the rule.
    """
    from joblib import delayed

    ranges = chunk_ranges(spec.samples, chunk_size, CHECK_EVERY if stop_rule else None)
    bar = Progress(spec.samples, progress)
    if folder is not None:
        folder.mkdir(parents=True, exist_ok=True)
        for stale in folder.glob("*" + TMP_SUFFIX):
            stale.unlink()  # a chunk interrupted while being written
        for path in chunk_files(folder):
            if int(path.stem[len(CHUNK_PREFIX):]) >= len(ranges):
                path.unlink()  # left from a run with another chunk plan
    # rounds end at multiples of CHECK_EVERY samples, whatever the workers or chunk size
    if stop_rule is None:
        rounds = [ranges]
    else:
        rounds = {}
        for r in ranges:
            rounds.setdefault(r[1] // CHECK_EVERY, []).append(r)
        rounds = list(rounds.values())
    frames: list[pd.DataFrame] = []
    finished = 0
    with InterruptGuard() as guard:
        for batch in rounds:
            finished += len(batch)
            if folder is None:
                tasks = [delayed(evaluate_chunk)(spec, s, e) for _, s, e in batch]
            else:
                tasks = []
                for i, s, e in batch:
                    if resume and chunk_is_complete(_chunk_path(folder, i), spec.signature,
                                                    s, e):
                        bar.advance(e - s)
                    else:
                        tasks.append(delayed(run_chunk_to_file)(spec, i, s, e, str(folder)))
            for item in _run_tasks(tasks, jobs, backend, scheduler):
                if folder is None:
                    frames.append(item)
                    bar.advance(len(item))
                else:
                    bar.advance(item)
                guard.check()  # an interrupt lost on its way stops the run here
            if stop_rule is not None and finished < len(ranges):
                if folder is None:
                    import pandas as pd

                    done = pd.concat(frames, ignore_index=True)
                    column = lambda name, d=done: d[name].to_numpy()  # noqa: E731
                else:
                    kept = [_chunk_path(folder, i) for i, _, _ in ranges[:finished]]
                    column = lambda name, k=kept: np.concatenate(  # noqa: E731
                        [_chunk_column(p, name) for p in k])
                if stop_rule(column):
                    if folder is not None:
                        for i, _, _ in ranges[finished:]:
                            _chunk_path(folder, i).unlink(missing_ok=True)
                    break
        guard.check()
    if progress and bar.done < bar.total:
        sys.stderr.write("\n")
    if folder is None:
        import pandas as pd

        return pd.concat(frames, ignore_index=True)
    return None


def _run_tasks(tasks, jobs: int, backend: str, scheduler: str | None):
    """Run joblib tasks in submission order, in-process when one local worker suffices."""
    from joblib import Parallel

    if not tasks:
        return
    if jobs == 1 and backend == "loky":
        for fn, args, kwargs in tasks:
            yield fn(*args, **kwargs)
        return
    with _backend(backend, scheduler, jobs):
        yield from Parallel(n_jobs=jobs, return_as="generator")(tasks)


def _connect(scheduler: str):
    """A dask client of the scheduler at ``scheduler``, or a ConnectionError saying so."""
    from distributed import Client

    try:
        return Client(scheduler)
    except (OSError, ValueError, TypeError) as exc:  # refused, timed out, malformed
        raise ConnectionError(f"cannot reach the dask scheduler at {scheduler!r} "
                              f"({exc})") from None


def probe_scheduler(scheduler: str) -> None:
    """Reach the dask scheduler once and let go: an unreachable one is refused before a
    result folder is touched (``--force`` had emptied the old results, then the run was
    refused)."""
    _connect(scheduler).close()


class _backend:
    """Context selecting the joblib backend (loky locally, dask.distributed on a cluster)."""

    def __init__(self, backend: str, scheduler: str | None, jobs: int):
        self.backend, self.scheduler, self.jobs = backend, scheduler, jobs
        self._stack = []

    def __enter__(self):
        from joblib import parallel_config

        if self.backend == "dask":
            from distributed import Client, LocalCluster

            if self.scheduler:
                client = _connect(self.scheduler)
            else:
                cluster = LocalCluster(n_workers=max(self.jobs, 1), threads_per_worker=1,
                                       processes=True, host="127.0.0.1",
                                       dashboard_address="127.0.0.1:0")  # no fixed port
                self._stack.append(cluster)
                client = Client(cluster)
            self._stack.append(client)
            cfg = parallel_config(backend="dask")
        else:
            cfg = parallel_config(backend="loky")
        cfg.__enter__()
        self._stack.append(cfg)
        return self

    def __exit__(self, *exc):
        while self._stack:
            obj = self._stack.pop()
            if hasattr(obj, "__exit__") and not hasattr(obj, "close"):
                obj.__exit__(*exc)
            else:
                obj.close()
        return False


def summary_mismatch(folder: Path, summary: dict) -> str | None:
    """Why the chunk files in ``folder`` do not hold the samples ``summary`` (a parsed
    summary.json) describes, or None: a chunk of another run (another seed, study, sampler
    or plan: an interrupted ``--resume --force`` leaves the old summary beside the new
    chunks), or samples no chunk holds (a file removed). A report drawn from them showed
    the summary's figures over plots of other samples."""
    # (a summary without planned_samples, written before it was, may count the samples of
    # a --target-ci run that stopped early, its chunks the plan's: no count compared then)
    want = {"study_hash": summary.get("study_hash"), "seed": summary.get("seed"),
            "samples": summary.get("planned_samples"), "sampler": summary.get("sampler")}
    spans, unreadable = [], False
    for path in chunk_files(folder):
        split = _split_stamp(path)
        if split is None:
            unreadable = True  # the read names it and how to mend it
            continue
        stamp, start, stop = split
        differ = [k for k, v in want.items() if v is not None and k in stamp and stamp[k] != v]
        if differ:
            told = "; ".join(_OTHER.get(k) or f"{k} {stamp[k]}, not {want[k]}" for k in differ)
            return f"{path.name} holds the samples of another run ({told})"
        if isinstance(start, int) and isinstance(stop, int):
            spans.append((start, stop))
    total = summary.get("samples")
    if unreadable or not spans or not isinstance(total, int):
        return None
    reached = 0
    for start, stop in sorted(spans):
        if start > reached:
            return f"no chunk holds samples {reached} to {start - 1} (a file removed?)"
        reached = max(reached, stop)
    if reached < total:
        return f"no chunk holds samples {reached} to {total - 1} (a file removed?)"
    return None


def column_names(folder: Path) -> list[str]:
    """The columns of a chunked result (its first chunk file's schema); none without one."""
    files = chunk_files(folder)
    if not files:
        return []
    with _readable(files[0]):
        return list(pq.read_schema(files[0]).names)


def is_chunk_name(name: str) -> bool:
    """Whether ``name`` is a chunk file's (``part-NNNNNN.parquet``)."""
    return _CHUNK_NAME.fullmatch(name) is not None


def chunk_files(folder: Path) -> list[Path]:
    """The run's chunk files, in order: ``part-NNNNNN.parquet`` only (a copy such as
    ``part-000003 (copy).parquet`` is no chunk and is never read)."""
    return sorted(p for p in Path(folder).glob(f"{CHUNK_PREFIX}*.parquet")
                  if _CHUNK_NAME.fullmatch(p.name))


def _chunk_column(path: Path, name: str, metadata=None) -> np.ndarray:
    """One column of one chunk file, the file opened for this read only (see
    :class:`ChunkColumns`)."""
    with pq.ParquetFile(path, metadata=metadata, page_checksum_verification=True) as f:
        return _read_column(f, name)


def _read_column(f: pq.ParquetFile, name: str) -> np.ndarray:
    return f.read(columns=[name], use_threads=False).column(name).to_numpy()


class UnreadableChunk(OSError):
    """A chunk file that cannot be read; its message names the file and how to mend it."""


@contextlib.contextmanager
def _readable(path: Path):
    """A chunk file that cannot be read (damaged, truncated, removed, or without the column
    asked for) raises :class:`UnreadableChunk`."""
    try:
        yield
    except (OSError, KeyError, pa.ArrowException) as exc:
        detail = " ".join(str(exc).split())  # one line: Arrow's own messages span several
        raise UnreadableChunk(errno.EIO, f"cannot be read ({detail}); continue the run with "
                              "--resume to compute this chunk again", str(path)) from None


#: most chunk files :class:`ChunkColumns` keeps open between reads (far below the usual
#: limit of 1024 open files; a longer run opens each file for each read)
OPEN_FILES = 128


class ChunkColumns:
    """``column(name)``: one column of a chunked result in sample order, every chunk file's
    footer parsed once for all the columns read (the summary reads some forty, the run
    insights some eighty).

    Each chunk file is opened as a ``ParquetFile`` with its cached footer and read on this
    thread: for one column of a few chunks that is several times faster than
    ``pq.read_table``, whose dataset layer, footer parsing and thread pool cost more than
    the read itself (44 columns of 13 chunks: 0.30 s against 0.92 s, measured on this
    project's machine). Up to :data:`OPEN_FILES` chunk files stay open between reads
    (40 columns of 25 chunks: 0.19 s against 0.94 s opening each file for each read); a
    longer run opens each file for each read, so it needs one file handle at a time. Use
    it as a context manager, or call :meth:`close`, to close the kept files.
    """

    def __init__(self, folder: Path):
        self.files = chunk_files(folder)
        self._metadata = [None] * len(self.files)
        self._open: list[pq.ParquetFile | None] = [None] * len(self.files)
        self._keep = len(self.files) <= OPEN_FILES

    def __call__(self, name: str) -> np.ndarray:
        parts = []
        for k, path in enumerate(self.files):
            with _readable(path):
                if self._metadata[k] is None:
                    self._metadata[k] = pq.read_metadata(path)
                if not self._keep:
                    parts.append(_chunk_column(path, name, self._metadata[k]))
                    continue
                if self._open[k] is None:
                    self._open[k] = pq.ParquetFile(path, metadata=self._metadata[k],
                                                   page_checksum_verification=True)
                parts.append(_read_column(self._open[k], name))
        return np.concatenate(parts) if parts else np.empty(0)

    def close(self) -> None:
        """Close the chunk files kept open (reading again reopens them)."""
        for k, f in enumerate(self._open):
            if f is not None:
                f.close()
                self._open[k] = None

    def __enter__(self) -> "ChunkColumns":
        return self

    def __exit__(self, *exc) -> bool:
        self.close()
        return False


def read_samples(folder: Path) -> pd.DataFrame:
    import pandas as pd

    frames = []
    for path in chunk_files(folder):
        with _readable(path):
            with pq.ParquetFile(path, page_checksum_verification=True) as f:
                frames.append(f.read(use_threads=False).to_pandas())
    return pd.concat(frames, ignore_index=True)
