"""Record the optimizer's curvature diagnostics while training.

    handle = ngopt.log_diagnostics(opt, "run.jsonl", every=50)
    for x, y in batches:
        ...; opt.step()
    handle.close()          # or use the handle as a context manager

``log_diagnostics`` registers a step hook on the optimizer; every ``every``
steps it takes ``opt.diagnostics()`` and hands the record to each target:

===========================  ===============================================
target                       what is written
===========================  ===============================================
``"*.jsonl"`` path           one JSON object per line: the snapshot plus
                             ``wall_time`` and ``log_seconds``
``"*.csv"`` path             one row per record, nested keys flattened with
                             dots (``layers.fc1.condition``); lists (the
                             spectra) are left out
TensorBoard writer           every number as a scalar (``layers/fc1/condition``),
(``add_scalar``,             each spectrum as a histogram of log10 eigenvalues
``add_histogram``)
``logging.Logger``           one INFO line per record (loss, norms, cosine,
                             trust scale, worst condition number, time split)
list / tuple of the above    all of them
===========================  ===============================================

Files are flushed after every record, so a crash loses at most the record
being written; the readers below skip a torn last line with a warning.

JSON has no infinity: non-finite numbers are written as the strings
``"Infinity"``, ``"-Infinity"`` and ``"NaN"`` and read back as floats.

CSV columns are fixed by the first record. When a later record brings a new
key (say a layer's spectra appear after its first inversion, or a probe
result), the file is rewritten once with the new column appended on the
right, earlier rows left empty there; the rewrite goes to a temporary file
that replaces the log atomically, so a crash during it keeps the old file.
A key missing from a later record is written as an empty cell.

Logged keys
-----------
Every record has the keys of ``opt.diagnostics()`` listed in
``ngopt/diagnostic_keys.py`` (the table at the end of this text is made from
it; CSV logs start with these columns, in that order), the layers' keys
below, and ``wall_time``, ``log_seconds`` and ``probe`` added here.
"cumulative" means summed since the optimizer was built.

=================================  =================================================================  ==========
key                                meaning                                                            unit
=================================  =================================================================  ==========
``wall_time``                      time the record was taken (``time.time()``)                        s (epoch)
``log_seconds``                    time spent by this logger before this record, cumulative           s
``layers.<name>.block``            layer kind of the curvature block (``linear``, ``conv1d``,         --
                                   ``conv2d``, ``embedding``, ``layer_norm``, ``batch_norm``)
``layers.<name>.structure``        curvature kind (``kfac``, ``ekfac``, ``ekfac-gradient``, ``diag``; --
                                   ``channel_pairs`` for norm layers)
``layers.<name>.in_dim``           size of the input factor A (bias column included)                  rows
``layers.<name>.out_dim``          size of the output-gradient factor G                               rows
``layers.<name>.condition``        condition number of the damped block (EKFAC: of the damped scales) 1
``layers.<name>.in_eig_min``       smallest eigenvalue of A (undamped)                                A units
``layers.<name>.in_eig_max``       largest eigenvalue of A (undamped)                                 A units
``layers.<name>.out_eig_min``      smallest eigenvalue of G (undamped)                                G units
``layers.<name>.out_eig_max``      largest eigenvalue of G (undamped)                                 G units
``layers.<name>.in_condition``     eig_max / eig_min of A (inf when eig_min <= 0)                     1
``layers.<name>.out_condition``    eig_max / eig_min of G (inf when eig_min <= 0)                     1
``layers.<name>.in_condition_damped``   condition number of A + pi sqrt(lambda) I                     1
``layers.<name>.out_condition_damped``  condition number of G + sqrt(lambda) / pi I                   1
``layers.<name>.in_trace``         trace of A                                                         A units
``layers.<name>.out_trace``        trace of G                                                         G units
``layers.<name>.in_damping``       damping added to A's diagonal, pi sqrt(lambda)                     A units
``layers.<name>.out_damping``      damping added to G's diagonal, sqrt(lambda) / pi                   G units
``layers.<name>.in_eigenvalues``   full spectrum of A, ascending (JSONL / TensorBoard only)           A units
``layers.<name>.out_eigenvalues``  full spectrum of G, ascending (JSONL / TensorBoard only)           G units
``layers.<name>.inversion_step``   step at which the eigenvalue figures were computed                 steps
``layers.<name>.diag_min``         smallest entry of the diagonal Fisher (``structure='diag'``)       curvature
``layers.<name>.diag_max``         largest entry of the diagonal Fisher (``structure='diag'``)        curvature
``layers.<name>.diag_mean``        mean entry of the diagonal Fisher (``structure='diag'``)           curvature
``layers.<name>.diag_values``      all diagonal entries, ascending (JSONL / TensorBoard only)         curvature
``layers.<name>.scale_min``        smallest EKFAC scale, the curvature in the Kronecker eigenbasis    curvature
``layers.<name>.scale_max``        largest EKFAC scale (``structure='ekfac'``, ``'ekfac-gradient'``)  curvature
``layers.<name>.scale_mean``       mean EKFAC scale (``structure='ekfac'``, ``'ekfac-gradient'``)     curvature
``layers.<name>.scale_values``     all EKFAC scales, ascending (JSONL / TensorBoard only)             curvature
``layers.<name>.pair_eig_min``     smallest eigenvalue of the per-channel (gamma, beta) Fisher blocks curvature
                                   of a norm layer
``layers.<name>.pair_eig_max``     largest eigenvalue of those blocks                                 curvature
``layers.<name>.pair_eig_mean``    mean eigenvalue of those blocks                                    curvature
``layers.<name>.pair_eig_values``  all their eigenvalues, ascending (JSONL / TensorBoard only)        curvature
``probe.*``                        result of ``ngopt.fisher_probe.probe_fisher_quality``, written     see there
                                   by ``handle.log_probe(result)``: per-layer errors and angles
                                   against the exact Fisher, the optimizer settings they are read
                                   with, and the warning texts (``probe.findings``)
=================================  =================================================================  ==========

A = E[a a^T] over layer inputs a (bias as a constant 1), G = E[g g^T] over
output gradients g; their units are those of a^2 and g^2. pi is the factored
damping split pi = sqrt((tr A / dim A) / (tr G / dim G)).  With
``structure='ekfac'`` the factors give only the eigenbasis: the ``in_``/``out_``
eigenvalue keys still describe A and G, their ``_damping`` keys are the split
K-FAC would use, and the damping lambda is added to the scales instead; the same
for ``structure='ekfac-gradient'``, whose scales follow the gradient.  For an
embedding, A is the diagonal of token frequencies (its eigenvalues are those
frequencies).
"""

from __future__ import annotations

import csv
import json
import logging
import math
import os
import tempfile
import time
import warnings
from numbers import Real
from pathlib import Path
from typing import Any, Iterable

from . import diagnostic_keys

__all__ = [
    "DiagnosticsLog",
    "log_diagnostics",
    "read_log",
    "read_jsonl_log",
    "read_csv_log",
    "flatten_record",
    "unflatten_record",
    "summary_line",
]



def _key_table() -> str:
    """The snapshot's keys with meaning and unit, as a reStructuredText table for this module's docstring."""
    rows = [(f"``{key}``", entry.meaning, entry.unit) for key, entry in diagnostic_keys.describe().items()]
    widths = [max(len(row[i]) for row in rows + [("key", "meaning", "unit")]) for i in range(3)]
    rule = "  ".join("=" * width for width in widths)
    line = lambda row: "  ".join(cell.ljust(width) for cell, width in zip(row, widths)).rstrip()  # noqa: E731
    return "\n".join(["", "Keys of every snapshot", "----------------------", "", rule,
                      line(("key", "meaning", "unit")), rule, *map(line, rows), rule, ""])


if __doc__ is not None:  # python -OO strips docstrings
    __doc__ += _key_table()

# Sub-dicts whose children are named by module names, which may contain dots.
_NAMED_CHILDREN = ("layers",)
_NONFINITE_TO_TEXT = {math.inf: "Infinity", -math.inf: "-Infinity"}
_TEXT_TO_NONFINITE = {"Infinity": math.inf, "-Infinity": -math.inf, "NaN": math.nan}
ACCEPTED_TARGETS = ("give a .jsonl or .csv path, a TensorBoard SummaryWriter, a logging.Logger, "
                    "or a non-empty list or tuple of these")


# --------------------------------------------------------------------------
# plain values
# --------------------------------------------------------------------------

def _all_finite_floats(values: list) -> bool:
    return all(type(v) is float for v in values) and all(map(math.isfinite, values))


def to_plain(value: Any) -> Any:
    """Turn tensors, numpy values and tuples into plain Python types."""
    kind = type(value)
    if kind is float or kind is int or kind is str or kind is bool or value is None:
        return value
    if kind is dict:
        return {str(k): to_plain(v) for k, v in value.items()}
    if kind is list or kind is tuple:
        # spectra are long lists of floats: keep the common case cheap
        return list(value) if all(type(v) is float for v in value) else [to_plain(v) for v in value]
    if isinstance(value, dict):
        return {str(k): to_plain(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [to_plain(v) for v in value]
    if isinstance(value, (bool, str)):
        return value
    if hasattr(value, "tolist"):  # torch.Tensor, numpy arrays and scalars
        return to_plain(value.tolist())
    if isinstance(value, int):
        return int(value)
    if isinstance(value, Real):
        return float(value)
    raise TypeError(f"diagnostics value of type {type(value).__name__} cannot be logged: {value!r}")


def _encode_nonfinite(value: Any) -> Any:
    if isinstance(value, dict):
        return {k: _encode_nonfinite(v) for k, v in value.items()}
    if isinstance(value, list):
        return value if _all_finite_floats(value) else [_encode_nonfinite(v) for v in value]
    if isinstance(value, float) and not math.isfinite(value):
        return "NaN" if math.isnan(value) else _NONFINITE_TO_TEXT[value]
    return value


def _decode_nonfinite(value: Any) -> Any:
    if isinstance(value, dict):
        return {k: _decode_nonfinite(v) for k, v in value.items()}
    if isinstance(value, list):
        return value if _all_finite_floats(value) else [_decode_nonfinite(v) for v in value]
    if isinstance(value, str) and value in _TEXT_TO_NONFINITE:
        return _TEXT_TO_NONFINITE[value]
    return value


def flatten_record(record: dict) -> dict:
    """Nested record -> {"layers.fc1.condition": value, ...}; lists are dropped."""
    return dict(_leaves("", record, ".", keep_lists=False))


def _leaves(prefix: str, node: Any, separator: str, keep_lists: bool) -> Iterable[tuple[str, Any]]:
    """``(joined key path, value)`` for every non-dict value under ``node`` (lists only with ``keep_lists``).

    A module function, not a recursive closure: the closure would be a reference cycle holding the record
    until the cyclic garbage collector runs.
    """
    if isinstance(node, dict):
        for key, child in node.items():
            yield from _leaves(f"{prefix}{separator}{key}" if prefix else str(key), child, separator, keep_lists)
    elif keep_lists or not isinstance(node, list):
        yield prefix, node


def unflatten_record(flat: dict) -> dict:
    """Inverse of :func:`flatten_record` (lists excepted).

    Under ``layers`` the child name is everything between ``layers.`` and the
    last dot, since module names such as ``encoder.0`` contain dots while the
    keys we log do not.
    """
    record: dict = {}
    for key, value in flat.items():
        parts = key.split(".")
        node = record
        i = 0
        while i < len(parts) - 1:
            part = parts[i]
            node = node.setdefault(part, {})
            if part in _NAMED_CHILDREN and len(parts) - i > 2:
                name = ".".join(parts[i + 1:-1])
                node = node.setdefault(name, {})
                i = len(parts) - 1
                break
            i += 1
        node[parts[-1]] = value
    return record


# --------------------------------------------------------------------------
# writers
# --------------------------------------------------------------------------

class JsonLinesWriter:
    """One JSON object per line, flushed after each record."""

    def __init__(self, path: Path, append: bool = False):
        self.path = Path(path)
        self._file = open(self.path, "a" if append else "w", encoding="utf-8")

    def write(self, record: dict) -> None:
        line = json.dumps(_encode_nonfinite(record), allow_nan=False, separators=(",", ":"))
        # one write call per record so a crash tears at most this line
        self._file.write(line + "\n")
        self._file.flush()

    def close(self) -> None:
        self._file.close()


def _csv_cell(value: Any) -> str:
    if value is None:
        return ""
    if isinstance(value, float):
        return repr(value)  # repr round-trips floats exactly, inf and nan included
    return str(value)


def _parse_csv_cell(text: str) -> Any:
    if text == "":
        return None
    if text in ("True", "False"):
        return text == "True"
    for parse in (int, float):
        try:
            return parse(text)
        except ValueError:
            pass
    return text


class CsvWriter:
    """Flattened records as CSV rows; see the module docstring for new keys."""

    def __init__(self, path: Path, append: bool = False):
        self.path = Path(path)
        self.columns: list[str] = []
        if append and self.path.exists() and self.path.stat().st_size > 0:
            with open(self.path, newline="", encoding="utf-8") as f:
                self.columns = next(csv.reader(f), [])
        else:
            self.path.write_text("", encoding="utf-8")
        self._file = open(self.path, "a", newline="", encoding="utf-8")

    def write(self, record: dict) -> None:
        flat = flatten_record(record)
        # A new log starts with every snapshot key in the schema's order, then the record's own.
        known = self.columns or diagnostic_keys.columns()
        new_columns = [key for key in known if key not in self.columns] + \
            [key for key in flat if key not in known]
        if new_columns:
            self._extend_columns(new_columns)
        writer = csv.writer(self._file)
        writer.writerow([_csv_cell(flat.get(key)) for key in self.columns])
        self._file.flush()

    def _extend_columns(self, new_columns: list[str]) -> None:
        """Rewrite the file with more columns, replacing it atomically."""
        self._file.close()
        with open(self.path, newline="", encoding="utf-8") as f:
            old_rows = list(csv.reader(f))[1:]
        self.columns = self.columns + new_columns
        fd, tmp_name = tempfile.mkstemp(dir=self.path.parent, prefix=self.path.name, suffix=".tmp")
        with os.fdopen(fd, "w", newline="", encoding="utf-8") as tmp:
            writer = csv.writer(tmp)
            writer.writerow(self.columns)
            for row in old_rows:
                writer.writerow(row + [""] * (len(self.columns) - len(row)))
        os.replace(tmp_name, self.path)
        self._file = open(self.path, "a", newline="", encoding="utf-8")

    def close(self) -> None:
        self._file.close()


class TensorBoardWriter:
    """Numbers as scalars, spectra as histograms of log10 eigenvalues.

    The writer belongs to the caller: it is flushed after each record but not
    closed.
    """

    def __init__(self, summary_writer: Any):
        self.summary_writer = summary_writer

    def write(self, record: dict) -> None:
        step = record.get("step", 0)
        walltime = record.get("wall_time")
        for tag, value in self._tags(record):
            if isinstance(value, list):
                self._histogram(tag, value, step, walltime)
            elif isinstance(value, Real) and not isinstance(value, bool):
                self.summary_writer.add_scalar(tag, value, global_step=step, walltime=walltime)
        self.summary_writer.flush()

    def _histogram(self, tag: str, values: list, step: int, walltime: Any) -> None:
        import numpy as np

        positive = np.asarray([v for v in values if isinstance(v, Real) and v > 0], dtype=np.float64)
        if positive.size:  # log10 because spectra span many decades
            self.summary_writer.add_histogram(f"{tag}_log10", np.log10(positive),
                                              global_step=step, walltime=walltime)

    @staticmethod
    def _tags(record: dict) -> Iterable[tuple[str, Any]]:
        for key, value in record.items():
            if key not in ("step", "wall_time"):
                yield from _leaves(key, value, "/", keep_lists=True)  # lists become histograms

    def close(self) -> None:
        self.summary_writer.flush()


def _format(value: Any, spec: str = ".3g") -> str:
    if value is None:
        return "-"
    if isinstance(value, Real):
        return format(value, spec)
    return str(value)


def summary_line(record: dict) -> str:
    """One-line human summary of a record."""
    update = record.get("update") or {}
    layers = record.get("layers") or {}
    parts = [f"step {record.get('step')}"]
    parts.append(f"loss {_format(update.get('loss'), '.4g')}")
    parts.append(f"|grad| {_format(update.get('grad_norm'))}")
    parts.append(f"|update| {_format(update.get('direction_norm'))}")
    parts.append(f"cos {_format(update.get('cosine'), '.3f')}")
    parts.append(f"trust {_format(update.get('trust_scale'))}")
    parts.append(f"damping {_format(update.get('damping'))}")
    conditions = {name: entry.get("condition") for name, entry in layers.items()
                  if isinstance(entry.get("condition"), Real)}
    if conditions:
        worst = max(conditions, key=lambda name: conditions[name])
        parts.append(f"worst cond {_format(conditions[worst], '.2e')} ({worst})")
    parts.append(f"skipped {record.get('skipped_steps', 0)}")
    times = record.get("time") or {}
    total = times.get("step_total")
    if isinstance(total, Real) and total > 0:
        split = ", ".join(f"{key} {100.0 * times[key] / total:.0f}%"
                          for key in diagnostic_keys.STEP_TIME
                          if isinstance(times.get(key), Real))
        parts.append(f"time {split}")
    return " | ".join(parts)


class LoggerWriter:
    """One summary line per record on a :class:`logging.Logger`."""

    def __init__(self, logger: logging.Logger, level: int = logging.INFO):
        self.logger = logger
        self.level = level

    def write(self, record: dict) -> None:
        self.logger.log(self.level, "ngopt diagnostics: %s", summary_line(record))
        if "probe" in record:
            self.logger.log(self.level, "ngopt fisher probe: %s", _probe_line(record["probe"]))

    def close(self) -> None:
        pass


def _probe_line(probe: dict) -> str:
    layers = probe.get("layers") or {}
    parts = [f"{name}: block error {_format(entry.get('block_error'))}, "
             f"angle {_format(entry.get('block_angle_deg'), '.1f')} deg"
             for name, entry in layers.items()]
    return "; ".join(parts) or "no layer small enough"


def make_writer(target: Any, append: bool = False):
    """Writer for one target: a path (.jsonl / .csv), a SummaryWriter or a Logger."""
    if isinstance(target, logging.Logger):
        return LoggerWriter(target)
    if isinstance(target, (str, os.PathLike)):
        path = Path(target)
        suffix = path.suffix.lower()
        if suffix == ".jsonl":
            return JsonLinesWriter(path, append=append)
        if suffix == ".csv":
            return CsvWriter(path, append=append)
        raise ValueError(f"target path must end in .jsonl or .csv, got {str(target)!r}")
    if callable(getattr(target, "add_scalar", None)) and callable(getattr(target, "add_histogram", None)):
        return TensorBoardWriter(target)
    raise TypeError(f"target: {ACCEPTED_TARGETS}; got {type(target).__name__}")


# --------------------------------------------------------------------------
# the handle
# --------------------------------------------------------------------------

class DiagnosticsLog:
    """Writes ``opt.diagnostics()`` every ``every`` steps; see :func:`log_diagnostics`."""

    def __init__(self, opt: Any, writers: list, every: int, spectra: bool):
        self.opt = opt
        self.writers = writers
        self.every = every
        self.records_written = 0
        self.log_seconds = 0.0  # time spent in this logger, the cost of logging
        self._closed = False
        self._restore_spectra = None
        if spectra:
            self._restore_spectra = (getattr(opt, "track_spectra", False),)
            opt.track_spectra = True
        self._last_logged_step = None
        self._noted_loss = None
        # Count steps ourselves so that steps without a record cost one
        # addition, not a snapshot; resynchronised at every record.
        self._step = int(opt.diagnostics().get("step", 0))
        self._hook = opt.register_step_post_hook(lambda optimizer, args, kwargs: self._after_step(optimizer))

    # -- hook ---------------------------------------------------------------
    def _after_step(self, opt: Any) -> None:
        self._step += 1
        if self._step % self.every != 0:
            return
        started = time.perf_counter()
        snapshot = opt.diagnostics()
        self._step = int(snapshot.get("step", self._step))
        if self._step != self._last_logged_step:
            self._write(snapshot)
        self.log_seconds += time.perf_counter() - started

    def _write(self, snapshot: dict, extra: dict | None = None) -> None:
        record = to_plain(snapshot)
        update = record.setdefault("update", {})
        if update.get("loss") is None and self._noted_loss is not None:
            update["loss"] = float(self._noted_loss)  # the only sync with the device, once per record
        record["wall_time"] = time.time()
        record["log_seconds"] = self.log_seconds
        if extra:
            record.update(to_plain(extra))
        for writer in self.writers:
            writer.write(record)
        self.records_written += 1
        self._last_logged_step = record.get("step")

    # -- public -------------------------------------------------------------
    def note_loss(self, loss) -> None:
        """Remember the training loss of the current step for ``update.loss``.

        In the plain loop the optimizer never sees the loss; call this after
        ``loss.backward()``. Only the latest value is kept and it is read
        (``float()``) when a record is written, so it costs nothing in between.
        """
        self._noted_loss = loss.detach() if hasattr(loss, "detach") else loss

    def log_probe(self, result: dict) -> None:
        """Write a record now: the current snapshot plus ``"probe": result``."""
        self._check_open()
        started = time.perf_counter()
        self._write(self.opt.diagnostics(), {"probe": result})
        self.log_seconds += time.perf_counter() - started

    def close(self) -> None:
        """Write the latest snapshot if it was not written yet, then stop logging."""
        if self._closed:
            return
        self._closed = True
        self._hook.remove()
        try:
            snapshot = self.opt.diagnostics()
            if snapshot.get("step", 0) > 0 and snapshot.get("step") != self._last_logged_step:
                self._write(snapshot)
        finally:
            for writer in self.writers:
                writer.close()
            if self._restore_spectra is not None:
                self.opt.track_spectra = self._restore_spectra[0]

    def _check_open(self) -> None:
        if self._closed:
            raise RuntimeError("this diagnostics log is closed")

    def __enter__(self) -> "DiagnosticsLog":
        return self

    def __exit__(self, *exc_info) -> None:
        self.close()


def log_diagnostics(opt: Any, target: Any, every: int = 50, *, spectra: bool = True,
                    append: bool = False) -> DiagnosticsLog:
    """Write a diagnostics record every ``every`` optimizer steps.

    Args:
        opt: the optimizer (needs ``diagnostics()`` and ``register_step_post_hook()``).
        target: a ``.jsonl`` or ``.csv`` path, a TensorBoard ``SummaryWriter``,
            a ``logging.Logger``, or a list/tuple of these.
        every: steps between records (a record is written when ``step % every == 0``).
        spectra: turn on ``opt.track_spectra`` so each inversion keeps the full
            factor spectra (restored on ``close()``).
        append: add to existing files instead of starting them anew (resumed runs).

    Returns:
        a :class:`DiagnosticsLog`; call ``close()`` (or use ``with``) at the end.
    """
    if isinstance(every, bool) or not isinstance(every, int):
        raise TypeError(f"every must be an int, got {type(every).__name__}")
    if every < 1:
        raise ValueError(f"every must be >= 1, got {every}")
    for name in ("diagnostics", "register_step_post_hook"):
        if not callable(getattr(opt, name, None)):
            raise TypeError(f"opt must provide {name}() (an ngopt.FisherDescent); "
                            f"got {type(opt).__name__}")
    targets = list(target) if isinstance(target, (list, tuple)) else [target]
    if not targets:
        raise ValueError(f"target: {ACCEPTED_TARGETS}; got an empty {type(target).__name__}")
    writers = []
    try:
        for item in targets:
            writers.append(make_writer(item, append=append))
    except Exception:
        for writer in writers:
            writer.close()
        raise
    return DiagnosticsLog(opt, writers, every, spectra)


# --------------------------------------------------------------------------
# readers
# --------------------------------------------------------------------------

def read_jsonl_log(path: str | os.PathLike) -> list[dict]:
    """Records of a JSON-lines log; a torn last line (a crash) is skipped with a warning."""
    path = Path(path)
    lines = path.read_text(encoding="utf-8").split("\n")
    ends_with_newline = lines[-1] == ""
    if ends_with_newline:
        lines = lines[:-1]
    records = []
    for number, line in enumerate(lines, start=1):
        if not line.strip():
            continue
        try:
            record = json.loads(line)
        except json.JSONDecodeError as error:
            if number == len(lines) and not ends_with_newline:
                warnings.warn(f"{path}: line {number} is incomplete (a record torn by a crash?); skipped")
                continue
            raise ValueError(f"{path}: line {number} is not valid JSON ({error.msg} at column "
                             f"{error.colno})") from None
        if not isinstance(record, dict) or not isinstance(record.get("step"), int):
            raise ValueError(f"{path}: line {number} is not a diagnostics record "
                             "(expected a JSON object with an integer 'step')")
        records.append(_decode_nonfinite(record))
    return records


def read_csv_log(path: str | os.PathLike) -> list[dict]:
    """Records of a CSV log, nested again (spectra are not in CSV logs)."""
    path = Path(path)
    with open(path, newline="", encoding="utf-8") as f:
        rows = list(csv.reader(f))
    if not rows:
        return []
    header = rows[0]
    if "step" not in header:
        raise ValueError(f"{path}: line 1 is not a diagnostics header (no 'step' column)")
    records = []
    for number, row in enumerate(rows[1:], start=2):
        if len(row) != len(header):
            if number == len(rows):
                warnings.warn(f"{path}: line {number} is incomplete (a record torn by a crash?); skipped")
                continue
            raise ValueError(f"{path}: line {number} has {len(row)} cells, the header has {len(header)}")
        flat = {key: _parse_csv_cell(cell) for key, cell in zip(header, row) if cell != ""}
        if not isinstance(flat.get("step"), int):
            raise ValueError(f"{path}: line {number} has no integer 'step'")
        records.append(unflatten_record(flat))
    return records


def read_log(path: str | os.PathLike) -> list[dict]:
    """Records of a ``.jsonl`` or ``.csv`` diagnostics log."""
    suffix = Path(path).suffix.lower()
    if suffix == ".jsonl":
        return read_jsonl_log(path)
    if suffix == ".csv":
        return read_csv_log(path)
    raise ValueError(f"log path must end in .jsonl or .csv, got {str(path)!r}")
