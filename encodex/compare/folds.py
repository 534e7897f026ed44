"""Cross-validation folds made of contiguous chunks of time.

Why chunks: spike counts and behaviour are autocorrelated over seconds (a rat runs through a
place field in about a second, a heading is held for several). Bins picked at random would put
near-copies of each test bin in the training set and inflate held-out scores. The default scheme
cuts the usable bins of one environment, in time order, into ``k * chunks_per_fold`` contiguous
chunks of (nearly) equal size and deals them to the k folds by a seeded permutation, so that
each fold gathers ``chunks_per_fold`` separate stretches of the session (default 3; a 30 min
session with 20 folds gives 30 s chunks, far longer than the autocorrelation of behaviour) and
slow drifts of behaviour over the session (coverage of the arena, fatigue) are spread over all
folds instead of landing in one.

The assignment depends only on the number of rows, ``k``, ``chunks_per_fold`` and the random
stream it is given, so every model of a cell (and every cell of an environment) is compared on
the same folds.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from sklearn.model_selection import PredefinedSplit

from encodex.defaults import DEFAULT_CHUNKS_PER_FOLD, DEFAULT_FOLDS
from encodex.errors import SettingsError


@dataclass(frozen=True)
class Folds:
    """Fold membership of the rows (usable bins) of one environment.

    Attributes
    ----------
    fold : ndarray of int, shape (n_rows,)
        Fold index (0 .. k-1) of each row, rows in time order.
    k : int
        Number of folds.
    """

    fold: np.ndarray
    k: int

    def splits(self) -> list[tuple[np.ndarray, np.ndarray]]:
        """Return ``[(train_rows, test_rows), ...]`` for folds 0 .. k-1, rows sorted.

        Uses :class:`sklearn.model_selection.PredefinedSplit`, which yields the folds in
        increasing fold index.
        """
        cached = self.__dict__.get("_splits")
        if cached is None:
            # Every model of a cell uses the same splits: work them out once.
            splitter = PredefinedSplit(self.fold)
            cached = [(np.asarray(tr), np.asarray(te)) for tr, te in splitter.split()]
            self.__dict__["_splits"] = cached
        return list(cached)

    def test_rows(self, f: int) -> np.ndarray:
        """Rows held out in fold ``f``."""
        return np.flatnonzero(self.fold == f)

    def train_rows(self, f: int) -> np.ndarray:
        """Rows used for training when fold ``f`` is held out."""
        return np.flatnonzero(self.fold != f)


def chunked_folds(
    n_rows: int,
    k: int = DEFAULT_FOLDS,
    chunks_per_fold: int = DEFAULT_CHUNKS_PER_FOLD,
    rng: np.random.Generator | int | None = 0,
) -> Folds:
    """Assign rows in time order to ``k`` folds made of contiguous chunks.

    Parameters
    ----------
    n_rows : int
        Number of usable bins (rows), in time order.
    k : int
        Number of folds (at least 2). The one-sided Wilcoxon signed-rank test used to compare
        models cannot reach p < 0.05 with fewer than 5 folds (smallest exact p is 2**-k).
    chunks_per_fold : int
        Number of contiguous chunks dealt to each fold (at least 1).
    rng : numpy Generator or int
        Random stream for dealing chunks to folds (an int is used as a seed).

    Returns
    -------
    Folds

    Raises
    ------
    SettingsError
        If ``k < 2``, ``chunks_per_fold < 1`` or there are fewer rows than chunks.
    """
    if k < 2:
        raise SettingsError(f"folds must be at least 2 (got {k}); use --folds 20 (default)")
    if chunks_per_fold < 1:
        raise SettingsError(f"chunks per fold must be at least 1 (got {chunks_per_fold})")
    n_chunks = k * chunks_per_fold
    if n_rows < n_chunks:
        raise SettingsError(
            f"only {n_rows} usable bins for {k} folds of {chunks_per_fold} chunks; "
            "use fewer folds or a longer recording"
        )
    rng = np.random.default_rng(rng)
    # Chunk c covers rows [edges[c], edges[c+1]); sizes differ by at most one row.
    edges = np.linspace(0, n_rows, n_chunks + 1).round().astype(np.int64)
    chunk_of_row = np.repeat(np.arange(n_chunks), np.diff(edges))
    # Each fold receives exactly chunks_per_fold chunks.
    fold_of_chunk = rng.permutation(np.repeat(np.arange(k), chunks_per_fold))
    return Folds(fold=fold_of_chunk[chunk_of_row].astype(np.int64), k=k)
