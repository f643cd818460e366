"""`panel-audit demo`: write the invented orchard registry, profile it, and report on it."""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING

if TYPE_CHECKING:  # pragma: no cover
    from auditor.commands.profile import ProfileResult

DEMO_UNIT = "orchard_id"
DEMO_TIME = "season"
DEMO_OUTCOME = "log_yield_ha"
#: The Hausman-Taylor set-up of examples/README.md for the report's model-readiness part:
#: X1 rainfall and irrigation, X2 labour, Z1 altitude and soil class (and the constant),
#: Z2 founder training, with period effects; training's eight planted one-season typos make
#: it nearly time-invariant, so it enters through each orchard's most common value.
DEMO_REGRESSORS: tuple[str, ...] = (
    "rainfall_mm",
    "irrigation_h",
    "labour_days",
    "altitude_m",
    "soil_class",
    "founder_training_yrs",
)
DEMO_CORRELATED: tuple[str, ...] = ("labour_days", "founder_training_yrs")
DEMO_TREAT_AS_INVARIANT: tuple[str, ...] = ("founder_training_yrs",)
DEMO_PERIOD_EFFECTS = True


@dataclass(frozen=True)
class DemoRun:
    """What the demo wrote: the folder, each file by name, and the profile of the registry."""

    out_dir: Path
    paths: dict[str, Path] = field(default_factory=dict)
    profile: ProfileResult | None = None


#: where ``panel-audit demo`` writes without --out (in the current folder)
DEFAULT_DIR = "panel-audit-demo"


def next_commands(run: DemoRun) -> list[str]:
    """Three commands to try next on the demo's files: the new season against the registry, model
    readiness with the set-up the demo's README describes, and a contract drafted and checked."""
    reg, nxt = run.paths.get("orchards"), run.paths.get("orchards_next_season")
    keys = f"--unit {DEMO_UNIT} --time {DEMO_TIME}"
    contract = run.out_dir / "contract.yaml"
    return [
        f"panel-audit compare {reg} {nxt} {keys}",
        f"panel-audit instruments {reg} {keys} --outcome {DEMO_OUTCOME} --regressors {','.join(DEMO_REGRESSORS)} "
        f"--correlated {','.join(DEMO_CORRELATED)} --period-effects"
        + "".join(f" --treat-as-invariant {c}" for c in DEMO_TREAT_AS_INVARIANT),
        f"panel-audit rules draft {reg} {keys} --out {contract} && "
        f"panel-audit check {nxt} --rules {contract} --against {reg}",
    ]


def run_demo(out: Path | str | None = None, *, force: bool = False) -> DemoRun:
    """Write the demo files into ``out`` (default: ``./panel-audit-demo``) and profile them.

    Writes ``orchards.csv``, ``orchards_next_season.csv``, ``orchards_profile.json``
    and ``orchards_report.html``; every file
    through an atomic write that refuses to replace an existing file unless
    ``force``. Returns a DemoRun with the folder, the paths by name and the
    ProfileResult of the registry.
    """
    from auditor.commands.profile import profile
    from auditor.commands.report import write_report
    from auditor.io.demo_data import csv_text, orchard_files
    from auditor.io.outputs import write_atomic
    from auditor.render.json import dumps

    out_dir = Path(DEFAULT_DIR if out is None else out)
    paths: dict[str, Path] = {}
    for name, frame in orchard_files().items():
        paths[name.removesuffix(".csv")] = write_atomic(out_dir / name, csv_text(frame), force=force)

    registry = paths["orchards"]
    result = profile(registry, unit=DEMO_UNIT, time=DEMO_TIME)
    paths["profile"] = write_atomic(
        out_dir / "orchards_profile.json",
        dumps(result.to_dict()),
        force=force,
        inputs=[registry],
    )

    paths["report"] = write_report(
        registry,
        unit=DEMO_UNIT,
        time=DEMO_TIME,
        out=out_dir / "orchards_report.html",
        outcome=DEMO_OUTCOME,
        regressors=list(DEMO_REGRESSORS),
        correlated=list(DEMO_CORRELATED),
        period_effects=DEMO_PERIOD_EFFECTS,
        treat_as_invariant=list(DEMO_TREAT_AS_INVARIANT),
        force=force,
    )
    return DemoRun(out_dir=out_dir, paths=paths, profile=result)
