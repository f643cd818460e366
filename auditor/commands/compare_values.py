"""The typed parts of a compare result: what the renderers read, and each part's JSON slice.

``compare`` (auditor/commands/compare.py) builds these values; the text and HTML
renderers and the report's figures read their attributes. Each part's ``to_dict()``
writes its slice of the contract's document (``/work/shared/contract.md``: the
``schema``, ``units``, ``periods``, ``rows``, ``sources`` objects and one object per
entry of ``columns``), with the same keys in the same order as before the parts were
typed; ``CompareResult.to_dict()`` composes them.

Shares are fractions, the stability index and the KS statistic dimensionless; a
value that could not be computed is None.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import asdict, dataclass
from typing import Any

#: a period label on the comparison's scale: a year or integer period, or text ("2024Q3")
PeriodLabel = int | str


class _Flat:
    """A part whose JSON object is its fields, in order (no nested part, no optional key)."""

    def to_dict(self) -> dict[str, Any]:
        """This part's object of the contract's ``compare`` document: every field, in order."""
        return asdict(self)  # type: ignore[call-overload]


@dataclass(frozen=True)
class TypeChange(_Flat):
    """A column whose type family differs between the base and the new wave."""

    column: str
    base: str  # the base's type name (compare's dtype names)
    new: str
    key: bool  # a unit or time key column (its change is an error)



@dataclass(frozen=True)
class SchemaChanges:
    """Columns added and removed by the new wave (key columns left out), and type changes."""

    added: tuple[str, ...]
    removed: tuple[str, ...]
    type_changed: tuple[TypeChange, ...]

    def to_dict(self) -> dict[str, Any]:
        """The contract's ``schema`` object."""
        return {"added": list(self.added), "removed": list(self.removed),
                "type_changed": [t.to_dict() for t in self.type_changed]}


@dataclass(frozen=True)
class UnitFlow(_Flat):
    """Units of the base and the new wave, and who came back (counts of units)."""

    base: int
    new: int
    returning: int  # new-wave units the base holds
    entering: int  # new-wave units the base does not hold
    not_returning: int  # base units the new wave does not bring back
    returning_after_absence: int  # returning units absent from the base's last period
    last_period: int  # units in the base's last period
    not_returning_from_last_period: int



@dataclass(frozen=True)
class PeriodPlacement:
    """Where the new wave's periods fall on the base's grid."""

    base: tuple[PeriodLabel, ...]
    new: tuple[PeriodLabel, ...]
    overlap: tuple[PeriodLabel, ...]  # new-wave periods the base holds already
    frequency: str  # the shared scale's frequency (auditor.io.waves.period_scale)
    step: int | None  # the base grid's step (None: no regular grid)
    colliding_keys: int  # (unit, period) keys of the new wave the base holds already

    def to_dict(self) -> dict[str, Any]:
        """The contract's ``periods`` object."""
        return {"base": list(self.base), "new": list(self.new), "overlap": list(self.overlap),
                "frequency": self.frequency, "step": self.step, "colliding_keys": self.colliding_keys}


@dataclass(frozen=True)
class RowCounts(_Flat):
    """Rows read on each side, those of the base's last period, and keyless new rows."""

    base: int
    new: int
    base_reference: int  # rows of the base period the distributions are compared with
    new_missing_keys: int



@dataclass(frozen=True)
class SourceNames(_Flat):
    """How the two inputs are named (a path, or which kind of frame)."""

    base: str
    new: str



# --- what each column's within-unit check found -----------------------------------------


@dataclass(frozen=True)
class FixedValueCheck:
    """A column held fixed within units in the base: returning units that changed it."""

    changed_units: int

    def to_dict(self) -> dict[str, Any]:
        """This check's keys of the column's object."""
        return {"changed_units": self.changed_units}


@dataclass(frozen=True)
class JumpCheck:
    """A changing column: what the base's own within-unit changes say, and the jumps found.

    ``change_scale_method`` names how the scale was found (``mad``, ``trimmed-sd``, ``sd``,
    ``step``, ``none``, possibly prefixed ``non-zero ``); ``expected_step`` is the step a
    period the column moves by for (nearly) every unit (an age), None when it has none.
    """

    change_median: float | None
    change_scale: float | None
    change_scale_method: str
    expected_step: float | None
    implausible_jumps: int

    def to_dict(self) -> dict[str, Any]:
        """This check's keys of the column's object (``expected_step`` only for a stepped column)."""
        out: dict[str, Any] = {"change_median": self.change_median, "change_scale": self.change_scale,
                               "change_scale_method": self.change_scale_method}
        if self.expected_step is not None:
            out["expected_step"] = self.expected_step
        out["implausible_jumps"] = self.implausible_jumps
        return out


@dataclass(frozen=True)
class SharedValueCheck:
    """A period-only column (one value for every unit in each base period): periods of the
    new wave in which units hold different values."""

    periods_with_several_values: int

    def to_dict(self) -> dict[str, Any]:
        """This check's keys of the column's object."""
        return {"expected": "one value per period", "periods_with_several_values": self.periods_with_several_values}


@dataclass(frozen=True)
class LevelCheck:
    """A categorical column's code list: levels new in the wave and levels gone.

    ``checked`` is False when the base holds more levels than ``compare.category_max_levels``;
    the counts are then None.
    """

    checked: bool
    new_levels: int | None = None
    vanished_levels: int | None = None

    def to_dict(self) -> dict[str, Any]:
        """This check's keys of the column's object."""
        if not self.checked:
            return {"levels_checked": False}
        return {"levels_checked": True, "new_levels": self.new_levels, "vanished_levels": self.vanished_levels}


WithinCheck = FixedValueCheck | JumpCheck | SharedValueCheck


@dataclass(frozen=True)
class ColumnShift:
    """How one column compares, new wave against the base's last period.

    ``compared_as`` is ``numeric`` (KS statistic and quantile-bin PSI) or ``levels``
    (PSI over levels; no KS); ``base_kind`` the column's kind in the base profile;
    ``n_base`` and ``n_new`` the non-missing values compared; ``missing_base`` and
    ``missing_new`` the shares of rows missing (null or NaN). ``within`` is what the
    check of returning units found (None when the column had none) and ``levels`` the
    code-list check (None for numeric columns).
    """

    column: str
    compared_as: str
    base_kind: str | None
    reference: str
    n_base: int
    n_new: int
    ks_statistic: float | None
    ks_p: float | None
    ks_p_method: str | None  # "exact" or "asymptotic"
    psi: float | None
    missing_base: float | None
    missing_new: float | None
    within: WithinCheck | None = None
    levels: LevelCheck | None = None

    @property
    def expected_step(self) -> float | None:
        """The base's step a period when the column is stepped (then compared less it), else None."""
        return self.within.expected_step if isinstance(self.within, JumpCheck) else None

    @property
    def less_step(self) -> bool:
        """Whether the new wave was compared less the base's step per period."""
        return self.expected_step is not None

    @property
    def changed_units(self) -> int | None:
        """Returning units that changed a fixed value (None: not a fixed column)."""
        return self.within.changed_units if isinstance(self.within, FixedValueCheck) else None

    @property
    def implausible_jumps(self) -> int | None:
        """Returning units whose change is implausible (None: not a changing numeric column)."""
        return self.within.implausible_jumps if isinstance(self.within, JumpCheck) else None

    @property
    def periods_with_several_values(self) -> int | None:
        """New periods whose units disagree on a period-only column (None: not period-only)."""
        return self.within.periods_with_several_values if isinstance(self.within, SharedValueCheck) else None

    @property
    def new_levels(self) -> int | None:
        """Levels never seen in the base (None: not checked)."""
        return self.levels.new_levels if self.levels is not None else None

    @property
    def vanished_levels(self) -> int | None:
        """Levels of the base's last period no new row uses (None: not checked)."""
        return self.levels.vanished_levels if self.levels is not None else None

    def to_dict(self) -> dict[str, Any]:
        """The contract's entry of ``columns`` for this column."""
        out: dict[str, Any] = {
            "column": self.column,
            "compared_as": self.compared_as,
            "less_step": self.less_step,
            "base_kind": self.base_kind,
            "reference": self.reference,
            "n_base": self.n_base,
            "n_new": self.n_new,
            "ks_statistic": self.ks_statistic,
            "ks_p": self.ks_p,
            "ks_p_method": self.ks_p_method,
            "psi": self.psi,
            "missing_base": self.missing_base,
            "missing_new": self.missing_new,
        }
        if self.within is not None:
            out.update(self.within.to_dict())
        if self.levels is not None:
            out.update(self.levels.to_dict())
        return out

    @classmethod
    def from_dict(cls, doc: Mapping[str, Any]) -> ColumnShift:
        """The column's entry of a compare document, typed again (the inverse of ``to_dict``)."""
        within: WithinCheck | None = None
        if "changed_units" in doc:
            within = FixedValueCheck(int(doc["changed_units"]))
        elif "change_scale_method" in doc:
            within = JumpCheck(doc.get("change_median"), doc.get("change_scale"), str(doc["change_scale_method"]),
                               doc.get("expected_step"), int(doc.get("implausible_jumps") or 0))
        elif "periods_with_several_values" in doc:
            within = SharedValueCheck(int(doc["periods_with_several_values"]))
        levels = None
        if "levels_checked" in doc:
            levels = LevelCheck(bool(doc["levels_checked"]), doc.get("new_levels"), doc.get("vanished_levels"))
        return cls(
            column=str(doc["column"]), compared_as=str(doc["compared_as"]), base_kind=doc.get("base_kind"),
            reference=str(doc["reference"]), n_base=int(doc["n_base"]), n_new=int(doc["n_new"]),
            ks_statistic=doc.get("ks_statistic"), ks_p=doc.get("ks_p"), ks_p_method=doc.get("ks_p_method"),
            psi=doc.get("psi"), missing_base=doc.get("missing_base"), missing_new=doc.get("missing_new"),
            within=within, levels=levels,
        )
