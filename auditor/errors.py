"""Every ``panel-audit: error:`` message the tool can print, in one place.

Code raises ``fail("code", **fields)``; the CLI prints ``panel-audit: error: <text>``
and exits 2. Each entry is a ``str.format`` template. Keep one entry per distinct
problem, and a test that triggers it (tests/test_error_catalogue.py).
"""

from __future__ import annotations

from typing import Any

CATALOGUE: dict[str, str] = {
    # --- arguments -----------------------------------------------------------
    "bad-argument": "{detail}",
    "no-command": "no command given; choose one of: {commands} (see 'panel-audit --help')",
    "unknown-schema": "no schema named '{name}'; choose one of: {names}",
    # --- loading ---------------------------------------------------------------
    "file-not-found": "cannot read '{path}': no such file; check the path",
    "not-a-file": "cannot read '{path}': it is a folder with no data files in it",
    "unreadable-file": "cannot read '{path}': {reason}",
    "unsupported-format": (
        "cannot read '{path}': unknown file type '{suffix}'; use .csv, .tsv (also .gz), "
        ".parquet, .arrow/.feather/.ipc or .jsonl/.ndjson"
    ),
    "corrupt-file": "cannot read '{path}' as {format}: {reason}",
    "empty-file": "'{path}' holds no data rows; nothing to audit",
    "empty-frame": "the data frame holds no rows; nothing to audit",
    "unsupported-object": "cannot audit an object of type {type}; pass a file path, a pandas or a polars DataFrame",
    "unknown-column": "column '{column}' not found; columns are: {available}",
    "key-all-null": "key column '{column}' is empty (all {rows} values are missing); choose another key",
    "key-repeated": "column '{column}' is named more than once among the keys",
    "unit-is-time": "column '{column}' cannot be both a unit key and the time key",
    "time-unorderable": (
        "time column '{column}' cannot be ordered: values such as {examples} are neither numbers nor dates"
    ),
    "time-fractional": (
        "time column '{column}' holds fractional values such as {examples}; periods must be whole numbers or dates"
    ),
    "reserved-column-name": (
        "column '{column}' starts with '{prefix}', which panel-audit keeps for its own helper columns; rename it"
    ),
    "duplicate-column-names": "the file has more than one column named {names}; rename them first",
    "no-glob-match": "no files match '{pattern}'",
    "too-large": "'{path}' ({size}) does not fit in memory here and cannot be streamed: {reason}",
    "out-of-memory": "the data does not fit in memory; use Parquet input with --streaming",
    "engine-needs-parquet": (
        "--engine dask reads Parquet files; {found} is {what}: convert it to Parquet, or use --engine memory"
    ),
    "engine-dask-missing": (
        "--engine dask needs the dask and distributed packages, which are not installed here: "
        "pip install 'panel-auditor[dask]'"
    ),
    "engine-no-scheduler": "cannot reach the dask scheduler at '{address}': {reason}; start one with 'dask scheduler'",
    "engine-scheduler-without-dask": "--scheduler names a dask scheduler; it needs --engine dask",
    "engine-conflict": "{detail}",
    "internal-problem": "internal problem ({kind}: {detail}); rerun with --debug and report it",
    # --- rule and threshold files ---------------------------------------------
    "rules-not-found": "rules file '{path}' not found",
    "rules-too-large": "rules file '{path}' is {size} bytes; the limit is {limit} bytes",
    "rules-syntax": "rules file '{path}' is not valid YAML at line {line}: {reason}",
    "rules-encoding": (
        "rules file '{path}' line {line}: byte {byte} is not UTF-8; save the file as UTF-8 "
        "(YAML files are Unicode; in many editors: Save As, encoding UTF-8)"
    ),
    "rules-too-deep": "rules file '{path}' line {line}: nested more than {limit} levels deep; no rule needs that",
    "rules-alias-loop": (
        "rules file '{path}' line {line}: alias '*{alias}' points into the node that holds it, "
        "so it would never end; write the values out"
    ),
    "rules-alias-expansion": (
        "rules file '{path}' line {line}: its aliases expand to more than {limit} values; write the values out "
        "or use fewer aliases"
    ),
    "rules-number-too-long": (
        "rules file '{path}' line {line}: a number written with {digits} characters; "
        "no threshold or bound needs more than {limit}"
    ),
    "rules-tag": "rules file '{path}' line {line}: the YAML tag '{tag}' is not allowed (tags never construct objects here)",
    "rules-not-mapping": "rules file '{path}' must hold a mapping at the top level, found {found}",
    "rules-unknown-key": "rules file '{path}' line {line}: unknown key '{key}' in {where}; expected one of: {expected}",
    "rules-bad-value": "rules file '{path}' line {line}: '{key}' must be {expected}, found {found}",
    # --- output ----------------------------------------------------------------
    "output-exists": "'{path}' already exists; pass --force to replace it",
    "output-is-input": "'{path}' is an input of this run; choose another output path",
    "details-not-folder": "--details '{path}' is a file, not a folder; give a folder for the details files",
    "unknown-finding-code": "there is no finding code '{name}'; 'panel-audit explain' lists them all ({close})",
    "output-unwritable": "cannot write '{path}': {reason}",
    "output-twice": "'{path}' would be written twice by this run, as {first} and as {second}; give each output its own path",
    "output-is-link": (
        "'{path}' is a symbolic link; outputs are never written through links: remove it or name the file it points to"
    ),
    "stdout-unwritable": "cannot write to standard output: {reason}; nothing was kept",
    # --- instruments -----------------------------------------------------------
    "instruments-unknown-outcome": "outcome column '{column}' not found; columns are: {available}",
    "instruments-unknown-regressor": "regressor '{column}' not found; columns are: {available}",
    "instruments-no-regressors": "--regressors names no column; give at least one, e.g. --regressors a,b",
    "instruments-regressor-repeated": "regressor '{column}' is named more than once in --regressors",
    "instruments-key-as-regressor": "'{column}' is a key column ({role}) and cannot also be the outcome or a regressor",
    "instruments-regressor-is-outcome": "'{column}' is the outcome and cannot also be a regressor; remove it from --regressors",
    "instruments-outcome-not-numeric": "outcome '{column}' holds {dtype} values; the outcome must be numeric",
    "instruments-regressor-unusable": "regressor '{column}' holds {dtype} values, which cannot enter a regression; convert it to numbers or text categories",
    "instruments-not-a-regressor": "{option} names '{column}', which is not among --regressors ({regressors})",
    "instruments-no-complete-rows": (
        "no row has the outcome and every regressor present ({rows} rows with keys, {dropped} dropped); "
        "check the missing values of {worst}"
    ),
    "instruments-too-many-levels": (
        "regressor '{column}' holds text with {levels} distinct values; at most {limit} become indicators "
        "(instruments.max_levels); group its rare values first, or leave it out"
    ),
    "instruments-one-unit": (
        "only one unit ({unit}) has complete rows; within, between and random-effects fits need at least two units"
    ),
    # --- compare ---------------------------------------------------------------
    "compare-key-missing": (
        "the {which} has no key column {missing}, so base and new wave share no key to compare on; "
        "its columns are: {available}; rename the key in one file or pass --unit/--time names both hold"
    ),
    "compare-empty-new": "the new wave {source} holds no data rows; nothing to compare against the base",
    "compare-time-mismatch": (
        "time key '{column}' cannot be put on one scale for both inputs: base values such as {base}, "
        "new-wave values such as {new}; write the periods the same way in both files"
    ),
    # --- check / rules ---------------------------------------------------------
    "contract-empty": "rules file '{path}' holds no 'panel' or 'columns' part; there is no rule to check",
    "contract-no-keys": (
        "rules file '{path}' does not name the panel keys; add panel.unit and panel.time, "
        "or pass --unit and --time"
    ),
    "contract-key-conflict": (
        "--{key} {given} differs from the {key} key '{declared}' in rules file '{path}'; "
        "drop the option or change the file"
    ),
    "contract-rule-conflict": (
        "rules file '{path}' line {line}: rule '{key}' of column '{column}' needs {expected}, "
        "which {other} rules out; no column can meet both"
    ),
    "contract-repeated-key": "rules file '{path}' line {line}: key '{key}' appears twice in {where}; keep one",
    "contract-engine": (
        "great-expectations could not evaluate rule '{rule}' of column '{column}': {reason}"
    ),
    # --- report ----------------------------------------------------------------
    "report-png-dir-not-folder": "--png-dir '{path}' is a file, not a folder; name a folder for the figures",
    "report-model-needs-both": (
        "the model readiness section needs both --outcome and --regressors; pass both, or neither"
    ),
}


class AuditError(Exception):
    """An input or argument problem that stops a command (exit code 2).

    ``code`` is a key of :data:`CATALOGUE`; ``message`` the filled-in text.
    """

    def __init__(self, code: str, message: str) -> None:
        super().__init__(message)
        self.code = code
        self.message = message

    def __reduce__(self) -> tuple[Any, ...]:
        # raised on a dask worker, it travels to the client pickled
        return (AuditError, (self.code, self.message))


def fail(code: str, **fields: Any) -> AuditError:
    """Return (for ``raise``) the AuditError for catalogue entry ``code`` filled with ``fields``."""
    template = CATALOGUE[code]
    return AuditError(code, template.format(**fields))


def short_list(values: Any, limit: int = 12) -> str:
    """Join values as ``a, b, c, ... (N in all)`` for an error message."""
    items = [str(v) for v in values]
    if len(items) <= limit:
        return ", ".join(items)
    return ", ".join(items[:limit]) + f", ... ({len(items)} in all)"


def broken(what: str) -> RuntimeError:
    """The error for a broken internal invariant (a bug, not bad input): raised where an
    ``assert`` would be, it survives ``python -O``; the command line reports it as
    ``internal-problem`` (exit 2)."""
    return RuntimeError(f"internal invariant broken: {what}")
