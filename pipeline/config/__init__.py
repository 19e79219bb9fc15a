"""The cycle config: one TOML file per reporting cycle, declared once in ``schema.py``.

Every field is a dataclass field with a docstring-like ``doc``; the loader (``loading.py``) walks
these declarations, so the schema, the defaults, the checks and the generated reference in
DEVELOPERS.md cannot drift apart.
"""

from pipeline.config.loading import has_password, load_config, reference_table
from pipeline.config.schema import (
    SECTIONS,
    CycleConfig,
    CycleSection,
    InputsSection,
    MeasureSection,
    ReportingSection,
    ReviewSection,
    SamplerSection,
    ValidationSection,
    family_for,
    family_of,
)

__all__ = [
    "SECTIONS",
    "CycleConfig",
    "CycleSection",
    "InputsSection",
    "MeasureSection",
    "ReportingSection",
    "SamplerSection",
    "ReviewSection",
    "ValidationSection",
    "family_for",
    "family_of",
    "has_password",
    "load_config",
    "reference_table",
]
