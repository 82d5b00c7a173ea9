"""QC rules evaluated on the sweep and cell tables; every verdict carries its reason."""

from __future__ import annotations

from dataclasses import dataclass


@dataclass(frozen=True)
class CellVerdict:
    """QC outcome of one cell.

    Parameters
    ----------
    qc_pass : bool
        False when any rule with consequence ``fail`` fired (or the cell could not be analysed).
    reasons : tuple of str
        Messages of the rules that failed the cell.
    flags : tuple of str
        Messages of rules that only flag the cell (it still passes).
    excluded : dict
        Sweep number -> reason, for sweeps left out of the cell's fits.
    """

    qc_pass: bool
    reasons: tuple[str, ...] = ()
    flags: tuple[str, ...] = ()
    excluded: dict[int, str] | None = None
