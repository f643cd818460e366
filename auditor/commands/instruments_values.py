"""The typed parts of :class:`auditor.commands.instruments.InstrumentsResult`.

Each part is a frozen dataclass whose fields are the JSON names of its slice of the
contract's ``instruments`` document, in the document's order; ``to_dict()`` writes that
slice (a field in ``_optional`` only when it is set, as the document has always done)
and ``from_dict()`` rebuilds the part from it (JSON arrays become tuples, missing names
take the field's default), so a document read back from disk renders like the result
that wrote it. The values held are the document's: finite floats or None (the command
builds each part from its cleaned slice), ints, strings and tuples of typed rows; the
only mappings are coefficients keyed by column name.

The renderers read these attributes; none of them indexes a result by string.
"""

from __future__ import annotations

import dataclasses
from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any, ClassVar, TypeVar

P = TypeVar("P", bound="Part")


def plain(value: Any) -> Any:
    """``value`` as JSON-shaped data: parts through their ``to_dict()``, tuples as lists."""
    if isinstance(value, Part):
        return value.to_dict()
    if isinstance(value, list | tuple):
        return [plain(v) for v in value]
    if isinstance(value, dict):
        return {k: plain(v) for k, v in value.items()}
    return value


def _frozen(value: Any) -> Any:
    """JSON arrays (at any depth) as tuples; mappings copied."""
    if isinstance(value, list | tuple):
        return tuple(_frozen(v) for v in value)
    if isinstance(value, Mapping):
        return dict(value)
    return value


class Part:
    """A typed slice of the document. Subclasses are frozen dataclasses.

    ``_optional``: fields written only when not None; ``_parts``: fields holding another
    part (or a tuple of them), rebuilt by ``from_dict``; ``_keys``: JSON names that
    differ from the field's (``with`` is a keyword).
    """

    _optional: ClassVar[frozenset[str]] = frozenset()
    _parts: ClassVar[Mapping[str, type[Part]]] = {}
    _keys: ClassVar[Mapping[str, str]] = {}

    def to_dict(self) -> dict[str, Any]:
        """This part's slice of the contract's JSON, keys in the document's order."""
        out: dict[str, Any] = {}
        for f in dataclasses.fields(self):  # type: ignore[arg-type]
            value = getattr(self, f.name)
            if value is None and f.name in self._optional:
                continue
            out[self._keys.get(f.name, f.name)] = plain(value)
        return out

    @classmethod
    def from_dict(cls: type[P], doc: Mapping[str, Any]) -> P:
        """The part rebuilt from its JSON slice (a name missing from ``doc`` takes its default)."""
        values: dict[str, Any] = {}
        for f in dataclasses.fields(cls):  # type: ignore[arg-type]
            key = cls._keys.get(f.name, f.name)
            if key not in doc:
                continue
            value, part = doc[key], cls._parts.get(f.name)
            if part is not None and value is not None:
                value = (tuple(part.from_dict(v) for v in value) if isinstance(value, list | tuple)
                         else part.from_dict(value))
            else:
                value = _frozen(value)
            values[f.name] = value
        return cls(**values)

    @classmethod
    def maybe(cls: type[P], doc: Mapping[str, Any] | None) -> P | None:
        """``from_dict(doc)``, or None for a missing slice."""
        return None if doc is None else cls.from_dict(doc)

    @classmethod
    def rows(cls: type[P], docs: Any) -> tuple[P, ...]:
        """A tuple of parts from a JSON array (None: empty)."""
        return tuple(cls.from_dict(d) for d in docs or ())


# --------------------------------------------------------------------------- the sample and the roles


@dataclass(frozen=True)
class SampleSummary(Part):
    """``sample``: the rows and units the fits use, the rows left out, the periods."""

    rows: int = 0
    units: int = 0
    rows_dropped: int = 0
    periods: int = 0
    period_effects: bool = False
    balanced: bool = True


@dataclass(frozen=True)
class RoleColumns(Part):
    """``roles``: the columns in X1 (period effects included), X2, Z1 and Z2 (the constant not listed)."""

    x1: tuple[str, ...] = ()
    x2: tuple[str, ...] = ()
    z1: tuple[str, ...] = ()
    z2: tuple[str, ...] = ()
    _keys = {"x1": "X1", "x2": "X2", "z1": "Z1", "z2": "Z2"}


@dataclass(frozen=True)
class ColumnUse(Part):
    """One ``columns`` entry: a design column as used (kind, role, the fits that identify it)."""

    column: str = ""
    source: str | None = None
    kind: str = ""
    role: str | None = None
    period_effect: bool = False
    identified_by: tuple[str, ...] = ()
    within_share: float | None = None
    base_level: str | None = None


@dataclass(frozen=True)
class SetAside(Part):
    """One ``not_identified`` entry: a column some fits set aside, why, with which columns."""

    column: str = ""
    reason: str = ""
    with_: tuple[str, ...] = ()
    fits: tuple[str, ...] = ()
    _keys = {"with_": "with"}


@dataclass(frozen=True)
class NearCollinear(Part):
    """One ``near_collinear`` entry: a kept column the earlier columns of a fit almost explain."""

    column: str = ""
    fit: str = ""
    r2: float | None = None
    with_: tuple[str, ...] = ()
    _keys = {"with_": "with"}


@dataclass(frozen=True)
class OrderCondition(Part):
    """``order_condition``: k1 excluded X1 means against g2 Z2 columns, and whether k1 >= g2."""

    k1: int = 0
    g2: int = 0
    met: bool = False


# --------------------------------------------------------------------------- instrument strength


@dataclass(frozen=True)
class ConfidenceSet(Part):
    """An Anderson-Rubin set: its level, its pieces ``(lo, hi)`` (None for an infinite end) and
    its kind (``interval``, ``ray``, ``two rays``, ``whole line`` or ``empty``)."""

    level: float | None = None
    intervals: tuple[tuple[float | None, float | None], ...] = ()
    kind: str | None = None


@dataclass(frozen=True)
class UnitStrength(Part):
    """One ``strength`` row: the unit-level first stage of an endogenous column, its critical
    value and verdict, and its Anderson-Rubin set (or why there is none)."""

    endogenous: str = ""
    role: str | None = None
    instruments: tuple[str, ...] = ()
    included: tuple[str, ...] = ()
    partial_f: float | None = None
    robust_f: float | None = None
    partial_r2: float | None = None
    df: tuple[int, ...] = ()
    critical_value: float | None = None
    critical_size: int | None = None
    critical_source: str | None = None
    conditional_f: float | None = None
    verdict_basis: str | None = None
    verdict: str | None = None
    p: float | None = None
    at_least_rule_of_thumb: bool | None = None
    at_least_lee: bool | None = None
    anderson_rubin: ConfidenceSet | None = None
    anderson_rubin_note: str | None = None
    _optional = frozenset({"anderson_rubin_note"})
    _parts = {"anderson_rubin": ConfidenceSet}


@dataclass(frozen=True)
class X2Strength(Part):
    """One ``x2_strength`` row: an X2 column's observation-level first stage."""

    endogenous: str = ""
    role: str = "X2"
    instruments: tuple[str, ...] = ()
    own_f: float | None = None
    other_f_cluster: float | None = None
    r2: float | None = None
    within_share: float | None = None


@dataclass(frozen=True)
class Candidate(Part):
    """One ``candidates`` row: one X1 unit mean alone as an instrument for a Z2 column."""

    endogenous: str = ""
    instrument: str = ""
    partial_f: float | None = None
    mundlak_p: float | None = None
    c_p: float | None = None
    usable_basis: str | None = None
    state: str | None = None
    usable: bool | None = None


@dataclass(frozen=True)
class SuggestedSet(Part):
    """One ``suggestion`` entry: the instrument set suggested for a Z2 column."""

    endogenous: str = ""
    instruments: tuple[str, ...] = ()
    partial_f: float | None = None
    critical_value: float | None = None
    critical_source: str | None = None
    verdict: str | None = None
    basis: str | None = None
    set_rejected: bool = False


@dataclass(frozen=True)
class ReferenceF(Part):
    """``reference_f``: the rule-of-thumb F and Lee et al.'s F for a 5% t test."""

    rule_of_thumb: float = 10.0
    lee: float = 104.7


# --------------------------------------------------------------------------- tests


@dataclass(frozen=True)
class ChiSquareTest(Part):
    """A chi-square test (Hausman contrast, Sargan): statistic, df, p, and for a contrast
    whether the covariance difference was positive definite (with a note when not)."""

    statistic: float | None = None
    df: int | None = None
    p: float | None = None
    positive_definite: bool | None = None
    note: str | None = None
    name: str | None = None
    _optional = frozenset({"positive_definite", "note", "name"})


@dataclass(frozen=True)
class MeanEffect(Part):
    """One Mundlak ``per_column`` row: the coefficient of a unit mean, its clustered t and p."""

    column: str = ""
    coef: float | None = None
    t: float | None = None
    p: float | None = None


@dataclass(frozen=True)
class MundlakTest(Part):
    """``tests.mundlak``: the joint Wald test of the unit means, the per-column rows, the
    level used and the means flagged at it."""

    statistic: float | None = None
    df: int | None = None
    p: float | None = None
    positive_definite: bool | None = None
    note: str | None = None
    per_column: tuple[MeanEffect, ...] = ()
    alpha: float | None = None
    flagged: tuple[str, ...] = ()
    _optional = frozenset({"positive_definite", "note"})
    _parts = {"per_column": MeanEffect}


@dataclass(frozen=True)
class AttritionTest(Part):
    """``tests.attrition``: the Nijman-Verbeek variable added to the within fit."""

    statistic: float | None = None
    df: int | None = None
    p: float | None = None
    variable: str | None = None
    t: float | None = None
    coef: float | None = None
    rows: int | None = None
    rows_without_next: int | None = None


@dataclass(frozen=True)
class SarganByEstimator(Part):
    """``tests.overidentification_by_estimator``: the Sargan test of each instrument set."""

    hausman_taylor: ChiSquareTest | None = None
    amemiya_macurdy: ChiSquareTest | None = None
    breusch_mizon_schmidt: ChiSquareTest | None = None
    _parts = {"hausman_taylor": ChiSquareTest, "amemiya_macurdy": ChiSquareTest, "breusch_mizon_schmidt": ChiSquareTest}


@dataclass(frozen=True)
class ContrastsWithHT(Part):
    """``tests.hausman_against_ht``: each richer instrument set against Hausman-Taylor."""

    amemiya_macurdy: ChiSquareTest | None = None
    breusch_mizon_schmidt: ChiSquareTest | None = None
    _parts = {"amemiya_macurdy": ChiSquareTest, "breusch_mizon_schmidt": ChiSquareTest}


@dataclass(frozen=True)
class SpecificationTests(Part):
    """``tests``: every specification test (None where not computed)."""

    mundlak: MundlakTest | None = None
    hausman_within_random: ChiSquareTest | None = None
    overidentification: ChiSquareTest | None = None
    hausman_within_ht: ChiSquareTest | None = None
    overidentification_by_estimator: SarganByEstimator | None = None
    hausman_against_ht: ContrastsWithHT | None = None
    attrition: AttritionTest | None = None
    attrition_note: str | None = None
    _optional = frozenset({"attrition_note"})
    _parts = {"mundlak": MundlakTest, "hausman_within_random": ChiSquareTest, "overidentification": ChiSquareTest,
              "hausman_within_ht": ChiSquareTest, "overidentification_by_estimator": SarganByEstimator,
              "hausman_against_ht": ContrastsWithHT, "attrition": AttritionTest}


# --------------------------------------------------------------------------- estimates


@dataclass(frozen=True)
class FitCoefficients(Part):
    """One fit's coefficients, classical and unit-clustered standard errors, by column name;
    for the richer instrument sets also the instrument count and a note."""

    coef: dict[str, float | None] = field(default_factory=dict)
    se: dict[str, float | None] = field(default_factory=dict)
    se_cluster: dict[str, float | None] = field(default_factory=dict)
    instruments: int | None = None
    note: str | None = None
    _optional = frozenset({"instruments", "note"})


#: the fits of ``estimates``, in the document's order
FITS: tuple[str, ...] = ("within", "between", "random", "mundlak", "hausman_taylor", "amemiya_macurdy",
                         "breusch_mizon_schmidt")


@dataclass(frozen=True)
class Estimates(Part):
    """``estimates``: each diagnostic fit's coefficients (None where it was not computed)."""

    within: FitCoefficients | None = None
    between: FitCoefficients | None = None
    random: FitCoefficients | None = None
    mundlak: FitCoefficients | None = None
    hausman_taylor: FitCoefficients | None = None
    amemiya_macurdy: FitCoefficients | None = None
    breusch_mizon_schmidt: FitCoefficients | None = None
    _parts = dict.fromkeys(FITS, FitCoefficients)

    def computed(self) -> tuple[tuple[str, FitCoefficients], ...]:
        """(the document's name, coefficients) of each fit that was computed, in the document's order."""
        fits = ((name, getattr(self, name)) for name in FITS)
        return tuple((name, fit) for name, fit in fits if fit is not None)


@dataclass(frozen=True)
class VarianceComponents(Part):
    """``variance_components``: sd of the unit effect and of the idiosyncratic error, the mean
    quasi-demeaning weight; those of Hausman-Taylor beside the random-effects ones."""

    sigma_u: float | None = None
    sigma_e: float | None = None
    theta_mean: float | None = None
    hausman_taylor: VarianceComponents | None = None
    _optional = frozenset({"hausman_taylor"})


VarianceComponents._parts = {"hausman_taylor": VarianceComponents}
