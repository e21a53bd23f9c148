"""Ellipsoid from Python: fit, score and replay anomaly models, and merge partial moments.

The fit is the trainer's own (the ``ellipsoid fit`` command's steps, limits and checks), and every
score is the device core's ``float32`` scoring, so a model fitted here has the bytes that
``ellipsoid fit --threads 1`` writes for the same rows, and its d² are the bits ``ellipsoid replay``
gives.

Data may be a 2-D numpy array (with ``features=`` names, or ``x0, x1, ...``), a pandas or a polars
data frame (column names are the feature names; a ``timestamp``, ``time`` or ``datetime`` column
is skipped as the command line skips it; ``columns=`` selects features).

>>> import numpy as np, ellipsoid
>>> rng = np.random.default_rng(7)
>>> x = rng.normal(size=(5000, 3)) @ np.array([[1.0, 0.5, 0.0], [0.0, 1.0, 0.3], [0.0, 0.0, 1.0]])
>>> model = ellipsoid.fit(x, features=["flow", "pressure", "current"], trained_at=0)
>>> d2 = model.score(x)
>>> model.features
['flow', 'pressure', 'current']

For data spread over partitions (a Dask or Spark cluster, many files), gather
:class:`Moments` per partition, merge them, and fit with :func:`fit_moments`.
"""

from __future__ import annotations

from typing import Any, Dict, Iterable, List, Optional, Sequence, Tuple

import numpy as np

from . import _ellipsoid

__all__ = ["Model", "Moments", "fit", "fit_moments", "load", "MOMENTS_VERSION"]

#: The version of the byte form that :meth:`Moments.to_bytes` writes (and pickles carry).
MOMENTS_VERSION: int = _ellipsoid.moments_version()

#: Column names skipped as a timestamp when ``timestamp=`` is not given (any case), as the CLI does.
TIMESTAMP_NAMES = ("timestamp", "time", "datetime")


def _frame_kind(data: Any) -> Optional[str]:
    mod = type(data).__module__
    if mod.startswith("pandas") and hasattr(data, "columns"):
        return "pandas"
    if mod.startswith("polars") and hasattr(data, "columns"):
        return "polars"
    return None


def _table(
    data: Any,
    features: Optional[Sequence[str]] = None,
    columns: Optional[Sequence[str]] = None,
    timestamp: Optional[str] = None,
) -> Tuple[List[str], np.ndarray]:
    """Feature names and a C-contiguous ``float64`` array (rows × features) of ``data``."""
    kind = _frame_kind(data)
    if kind is None:
        arr = np.asarray(data)
        if arr.ndim != 2:
            raise ValueError(f"expected a 2-D array (rows × features), not {arr.ndim}-D")
        if columns is not None:
            raise ValueError("columns= selects data-frame columns; slice the array instead")
        names = list(features) if features is not None else [f"x{i}" for i in range(arr.shape[1])]
        if len(names) != arr.shape[1]:
            raise ValueError(f"{arr.shape[1]} columns but {len(names)} feature names")
        return names, np.ascontiguousarray(arr, dtype=np.float64)
    if features is not None:
        raise ValueError("features= names numpy columns; a data frame's columns have names already")
    all_cols = [str(c) for c in data.columns]
    if timestamp is not None and timestamp not in all_cols:
        raise ValueError(f"no timestamp column `{timestamp}` (columns: {', '.join(all_cols)})")
    ts = timestamp
    if ts is None:
        ts = next((c for c in all_cols if c.lower() in TIMESTAMP_NAMES), None)
    if columns is not None:
        names = [str(c) for c in columns]
        missing = [c for c in names if c not in all_cols]
        if missing:
            raise ValueError(
                f"no column {', '.join('`' + m + '`' for m in missing)} (columns: {', '.join(all_cols)})"
            )
    else:
        names = [c for c in all_cols if c != ts]
    if kind == "pandas":
        from pandas.api.types import is_numeric_dtype

        sub = data[names]
        bad = [c for c in names if not is_numeric_dtype(sub[c].dtype)]
        if bad:
            raise ValueError(
                f"column(s) {', '.join('`' + b + '`' for b in bad)} are not numeric; choose the "
                "feature columns with columns="
            )
        arr = sub.to_numpy(dtype=np.float64)
    else:
        sub = data.select(names)
        bad = [c for c, t in zip(names, sub.dtypes) if not t.is_numeric()]
        if bad:
            raise ValueError(
                f"column(s) {', '.join('`' + b + '`' for b in bad)} are not numeric; choose the "
                "feature columns with columns="
            )
        arr = sub.to_numpy().astype(np.float64, copy=False)
    return names, np.ascontiguousarray(arr, dtype=np.float64)


def _model_rows(model: "Model", data: Any, timestamp: Optional[str] = None) -> np.ndarray:
    """The columns of ``data`` in the model's feature order (data frames are matched by name)."""
    if _frame_kind(data) is None:
        return _table(data, features=model.features)[1]
    return _table(data, columns=model.features, timestamp=timestamp)[1]


def fit(
    data: Any,
    *,
    features: Optional[Sequence[str]] = None,
    columns: Optional[Sequence[str]] = None,
    timestamp: Optional[str] = None,
    source: str = "<memory>",
    log: Sequence[str] = (),
    shrinkage: str = "none",
    loading: float = 0.01,
    robust: bool = False,
    holdout: float = 0.2,
    threshold: str = "hotelling",
    confidence: float = 0.9,
    simulations: Optional[int] = None,
    simulation_seed: Optional[int] = None,
    independent_rows: bool = False,
    strict_baseline: bool = False,
    alarms_per_day: float = 1.0,
    rate_hz: float = 1.0,
    alpha: Optional[float] = None,
    validation: Optional[str] = None,
    label_column: str = "label",
    raise_after: int = 3,
    clear_after: int = 10,
    clear_fraction: float = 0.75,
    latch: bool = False,
    model_id: Optional[int] = None,
    sequence: int = 1,
    trained_at: Optional[int] = None,
    skip_bad_rows: bool = False,
    report: bool = False,
    no_fpu: bool = False,
) -> "Model":
    """Fit a model of healthy operation to ``data`` (rows in time order), as ``ellipsoid fit`` does.

    Every option is the command line's of the same name (``--holdout`` is ``holdout=`` and so on;
    ``ellipsoid fit --help`` explains each; ``report=True`` keeps the page ``--report`` writes in
    :attr:`Model.report_html`). The hold-out is the last ``holdout`` share of the rows.
    ``source`` names the data in messages and is the card's ``trained_on``. ``validation`` is a
    labelled CSV file, as on the command line. Bad input (a NaN, a constant or collinear feature, a
    gross outlier) raises ``ValueError`` naming the row index (0-based) and column; where the
    command's summary names file lines (rows set aside, hold-out alarms), ``summary`` and
    ``summary_dict()`` give these row indices.

    The result's ``blob`` and ``card`` are the bytes ``ellipsoid fit --threads 1 --trained-at T``
    writes for the same rows written as CSV (``trained_at=T``; without it the blob holds the time of
    the fit). With more reader threads the command merges partial sums in another order, which can
    change the last bits of the ``float64`` statistics and so the derived model id.
    """
    if alpha is not None and alarms_per_day != 1.0:
        raise ValueError("give alarms_per_day or alpha, not both")
    names, arr = _table(data, features, columns, timestamp)
    opts = dict(
        log=list(log), shrinkage=shrinkage, loading=loading, robust=robust, holdout=holdout,
        threshold=threshold, confidence=confidence, simulations=simulations,
        simulation_seed=simulation_seed, independent_rows=independent_rows,
        strict_baseline=strict_baseline, alarms_per_day=alarms_per_day, rate_hz=rate_hz,
        alpha=alpha, validation=validation, label_column=label_column, raise_after=raise_after,
        clear_after=clear_after, clear_fraction=clear_fraction, latch=latch, model_id=model_id,
        sequence=sequence, trained_at=trained_at, skip_bad_rows=skip_bad_rows, report=report,
        no_fpu=no_fpu,
    )
    return Model._wrap(_ellipsoid.fit_rows_py(arr, names, source, opts))


def fit_moments(
    moments: "Moments",
    *,
    source: str = "<moments>",
    shrinkage: str = "none",
    loading: float = 0.01,
    threshold: str = "hotelling",
    confidence: float = 0.9,
    simulations: Optional[int] = None,
    simulation_seed: Optional[int] = None,
    independent_rows: bool = False,
    strict_baseline: bool = False,
    alarms_per_day: float = 1.0,
    rate_hz: float = 1.0,
    alpha: Optional[float] = None,
    validation: Optional[str] = None,
    label_column: str = "label",
    raise_after: int = 3,
    clear_after: int = 10,
    clear_fraction: float = 0.75,
    latch: bool = False,
    model_id: Optional[int] = None,
    sequence: int = 1,
    trained_at: Optional[int] = None,
    robust: bool = False,
    holdout: float = 0.0,
    report: bool = False,
) -> "Model":
    """Fit merged :class:`Moments`: the same model as :func:`fit` on all their rows with
    ``holdout=0`` (mean and covariance to rounding error).

    Options that need the rows themselves are refused with ``ValueError`` saying why:
    ``robust=True`` (FAST-MCD), ``shrinkage="ledoit-wolf"``, ``holdout > 0`` (and so
    ``threshold="empirical"``, a quantile of the hold-out), and skipping or setting aside a gross
    outlier (drop such rows before pushing them). ``shrinkage="diagonal"``, the other thresholds
    and the time-correlation correction work from the moments. The lag-1 autocorrelation misses the
    one pair of consecutive rows across each seam between merged partitions.
    """
    if alpha is not None and alarms_per_day != 1.0:
        raise ValueError("give alarms_per_day or alpha, not both")
    opts = dict(
        shrinkage=shrinkage, loading=loading, robust=robust, holdout=holdout, threshold=threshold,
        confidence=confidence, simulations=simulations, simulation_seed=simulation_seed,
        independent_rows=independent_rows, strict_baseline=strict_baseline,
        alarms_per_day=alarms_per_day, rate_hz=rate_hz, alpha=alpha, validation=validation,
        label_column=label_column, raise_after=raise_after, clear_after=clear_after,
        clear_fraction=clear_fraction, latch=latch, model_id=model_id, sequence=sequence,
        trained_at=trained_at, log=list(moments.log_features), report=report,
    )
    return Model._wrap(_ellipsoid.fit_moments_py(moments._p, source, opts))


def load(path: str) -> "Model":
    """Read a model blob and the card beside it (``.json``), as ``ellipsoid replay --model`` does."""
    return Model._wrap(_ellipsoid.load_py(str(path)))


def _model_from_parts(blob: bytes, card: str, summary: str = "", summary_json: str = "") -> "Model":
    return Model._wrap(_ellipsoid.model_from_parts(blob, card, summary, summary_json))


class Model:
    """A fitted model: its blob and card, what ``ellipsoid fit`` prints about it, and the device
    core's scoring. Made by :func:`fit`, :func:`fit_moments` or :func:`load`; pickles as its blob,
    card and summaries (the card is checked against the blob when unpickled)."""

    __slots__ = ("_m",)

    def __init__(self) -> None:
        raise TypeError("models come from ellipsoid.fit, ellipsoid.fit_moments or ellipsoid.load")

    @classmethod
    def _wrap(cls, m: Any) -> "Model":
        obj = object.__new__(cls)
        obj._m = m
        return obj

    @property
    def blob(self) -> bytes:
        """The model blob, byte for byte what ``ellipsoid fit --out`` writes."""
        return self._m.blob

    @property
    def card(self) -> str:
        """The model card (JSON text), byte for byte what ``ellipsoid fit`` writes beside the blob."""
        return self._m.card

    @property
    def features(self) -> List[str]:
        """Feature names, in model order."""
        return self._m.features

    @property
    def threshold(self) -> float:
        """The alarm threshold on d², as stored in the blob (a ``float32`` value)."""
        return self._m.threshold

    @property
    def clear_threshold(self) -> float:
        """The clear threshold on d², as stored in the blob."""
        return self._m.clear_threshold

    @property
    def mean(self) -> List[float]:
        """The fitted mean in raw units (log units for log features), from the blob."""
        return self._m.mean

    @property
    def summary(self) -> str:
        """What ``ellipsoid fit`` prints (empty for a model loaded from a file)."""
        return self._m.summary

    def summary_dict(self) -> Dict[str, Any]:
        """What ``ellipsoid fit --json`` prints, parsed (empty for a model loaded from a file)."""
        import json

        text = self._m.summary_json
        return json.loads(text) if text else {}

    @property
    def report_html(self) -> str:
        """The HTML report of ``ellipsoid fit --report`` (empty unless fitted with ``report=True``)."""
        return self._m.report_html

    def save(self, path: str, report: Optional[str] = None) -> None:
        """Write the blob to ``path`` and the card beside it (``.json``), and the HTML report to
        ``report`` if given: all or nothing, as ``ellipsoid fit`` writes them."""
        if report is not None and not self.report_html:
            raise ValueError("no report to write: fit with report=True")
        self._m.save(str(path), None if report is None else str(report))

    def score(self, data: Any, *, timestamp: Optional[str] = None) -> np.ndarray:
        """The core's ``float32`` d² of each row (data frames matched to the features by name),
        NaN where the core could not score a row (a fault on the device)."""
        return self._m.score(_model_rows(self, data, timestamp))

    def replay(self, data: Any, *, timestamp: Optional[str] = None, frame: bool = True) -> Any:
        """Every row through the core and its alarm state machine, as ``ellipsoid replay``.

        Returns a pandas data frame with the replay CSV's columns (``index, d2, d2_bits, verdict,
        alarm, fault, event, top_feature, c_<feature>...``) when pandas is installed and ``frame``
        is true, else a dict of arrays (``contributions`` rows × features). ``d2_bits`` is the
        ``float32`` bit pattern as an integer (the CSV prints it in hex); 0 on a fault row, whose
        ``d2`` is NaN.
        """
        out = self._m.replay(_model_rows(self, data, timestamp))
        if not frame:
            return out
        try:
            import pandas as pd
        except ImportError:
            return out
        keys = ("index", "d2", "d2_bits", "verdict", "alarm", "fault", "event", "top_feature")
        cols: Dict[str, Any] = {k: out[k] for k in keys}
        for j, name in enumerate(self.features):
            cols[f"c_{name}"] = out["contributions"][:, j]
        return pd.DataFrame(cols)

    def __reduce__(self) -> Tuple[Any, Tuple[bytes, str, str, str]]:
        return (_model_from_parts, (self.blob, self.card, self._m.summary, self._m.summary_json))

    def __repr__(self) -> str:
        return f"Model(features={self.features!r}, threshold={self.threshold!r})"


def _moments_from_bytes(b: bytes) -> "Moments":
    return Moments.from_bytes(b)


class Moments:
    """Partial moments of rows: merge them across partitions, pickle them, fit them.

    Holds the row count, mean and co-moment (Welford, merged by Chan et al.'s formula), each stretch's
    lag-1 co-moments (for the time-correlation correction of the limit), each feature's extremes and
    a sample of at most 10 000 rows keyed by a hash of their values (for the outlier gate and the
    diagnostics), so the merged moments of any partitioning give the fit of all the rows. Memory does
    not grow with the rows.

    The byte form (:meth:`to_bytes`, also what ``pickle`` carries) is versioned
    (:data:`MOMENTS_VERSION`) and little-endian; its layout is documented in the trainer's
    ``fit/memory.rs``.

    >>> import numpy as np, pickle, ellipsoid
    >>> x = np.random.default_rng(1).normal(size=(1000, 2))
    >>> a = ellipsoid.Moments(["a", "b"]).push(x[:400])
    >>> b = pickle.loads(pickle.dumps(ellipsoid.Moments(["a", "b"]).push(x[400:])))
    >>> a.merge(b).n
    1000
    """

    __slots__ = ("_p",)

    def __init__(self, features: Sequence[str], log: Sequence[str] = ()) -> None:
        self._p = _ellipsoid.PartialMoments(list(features), list(log))

    @classmethod
    def of(
        cls,
        data: Any,
        *,
        features: Optional[Sequence[str]] = None,
        columns: Optional[Sequence[str]] = None,
        timestamp: Optional[str] = None,
        log: Sequence[str] = (),
        skip_bad_rows: bool = False,
        name: str = "<memory>",
    ) -> "Moments":
        """The moments of ``data`` (array or data frame, as :func:`fit` takes it)."""
        names, arr = _table(data, features, columns, timestamp)
        m = cls(names, log)
        m._p.push(arr, name, skip_bad_rows)
        return m

    def push(self, data: Any, *, skip_bad_rows: bool = False, name: str = "<memory>",
             timestamp: Optional[str] = None) -> "Moments":
        """Add rows (in time order, after the rows pushed before); returns ``self``.

        A data frame's columns are matched by name. A NaN, an infinity or a non-positive value of a
        log feature raises ``ValueError`` naming the row and column, and nothing of the call is
        kept, unless ``skip_bad_rows`` (then such rows are counted in :attr:`skipped`).
        """
        if _frame_kind(data) is None:
            arr = _table(data, features=self.features)[1]
        else:
            arr = _table(data, columns=self.features, timestamp=timestamp)[1]
        self._p.push(arr, name, skip_bad_rows)
        return self

    def merge(self, other: "Moments") -> "Moments":
        """Fold in ``other`` (any order, any tree of merges); returns ``self``."""
        self._p.merge(other._p)
        return self

    @staticmethod
    def merged(parts: Iterable["Moments"]) -> "Moments":
        """The merge of ``parts`` (a new object; the parts are left as they are)."""
        it = iter(parts)
        try:
            first = next(it)
        except StopIteration:
            raise ValueError("no moments to merge") from None
        acc = first.copy()
        for p in it:
            acc.merge(p)
        return acc

    def copy(self) -> "Moments":
        m = Moments.__new__(Moments)
        m._p = self._p.copy()
        return m

    def to_bytes(self) -> bytes:
        """The versioned byte form."""
        return self._p.to_bytes()

    @staticmethod
    def from_bytes(b: bytes) -> "Moments":
        """Read :meth:`to_bytes`'s form; a damaged or foreign input raises ``ValueError``."""
        m = Moments.__new__(Moments)
        m._p = _ellipsoid.PartialMoments.from_bytes(bytes(b))
        return m

    def __reduce__(self) -> Tuple[Any, Tuple[bytes]]:
        return (_moments_from_bytes, (self.to_bytes(),))

    @property
    def features(self) -> List[str]:
        return self._p.features

    @property
    def log_features(self) -> List[str]:
        return self._p.log_features

    @property
    def n(self) -> int:
        """Rows pushed (skipped rows not counted)."""
        return self._p.n

    @property
    def skipped(self) -> int:
        """Rows skipped by ``push(..., skip_bad_rows=True)``."""
        return self._p.skipped

    def mean(self) -> np.ndarray:
        """The mean (log units for log features)."""
        return self._p.mean()

    def covariance(self) -> np.ndarray:
        """The sample covariance, denominator n − 1."""
        return self._p.covariance()

    def __repr__(self) -> str:
        return f"Moments(features={self.features!r}, n={self.n})"
