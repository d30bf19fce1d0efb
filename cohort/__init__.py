"""dka-cohort: diabetic ketoacidosis episodes from OMOP CDM extracts.

The public face of the package. Stages of the data flow live in their own modules
(source -> sql recipes -> features -> stats -> report); this module re-exports what users call.
Stage functions are imported on first use, so ``import cohort`` stays quick.

Examples
--------
>>> import cohort
>>> cohort.list_definitions()
['ada-2009', 'consensus-2024', 'ispad-2022', 'jbds-2023']
"""

from __future__ import annotations

from importlib import import_module
from importlib.metadata import PackageNotFoundError, version
from typing import Any

from cohort._errors import CohortError, DefinitionError, DisclosureError, InputError, SchemaError

try:
    __version__ = version("dka-cohort")
except PackageNotFoundError:  # pragma: no cover - running from a bare source tree
    __version__ = "0.0.0"

_LAZY = {
    "open_extract": "cohort.source",
    "Extract": "cohort.source",
    "prepare_lab_events": "cohort._labs",
    "LabSummary": "cohort._labs",
    "read_codelists": "cohort._codelists",
    "list_definitions": "cohort.definitions",
    "definitions_dir": "cohort._paths",
    "load_definition": "cohort.definitions",
    "Definition": "cohort.definitions",
    "find_episodes": "cohort.episodes",
    "EpisodeResult": "cohort.episodes",
    "run_features": "cohort.features",
    "build_features": "cohort.features",
    "load_feature_inputs": "cohort.features",
    "FeatureOptions": "cohort.features",
    "data_dictionary": "cohort.features",
    "run_analyses": "cohort.analyse",
    "with_death_in_follow_up": "cohort.analyse",
    "write_report": "cohort.report",
    "check_disclosure": "cohort.report",
    "suppress_counts": "cohort.disclosure",
    "sql_command": "cohort.engines",
}

__all__ = [
    "__version__",
    "CohortError",
    "DefinitionError",
    "DisclosureError",
    "InputError",
    "SchemaError",
    *sorted(_LAZY),
]


def __getattr__(name: str) -> Any:
    module = _LAZY.get(name)
    if module is None:
        msg = f"module 'cohort' has no attribute {name!r}"
        raise AttributeError(msg)
    value = getattr(import_module(module), name)
    globals()[name] = value
    return value


def __dir__() -> list[str]:
    return sorted(set(globals()) | set(_LAZY))
