"""Settings: one typed, frozen value per setting and one parser each, shared by the command line,
the gate config, the tolerance file and the Python API. ``defaults`` holds every default once,
``values`` the parsers (numbers, counts, lists, seed, percentile, task, budgets), ``tolerance``
the atol/rtol pair and its per-tensor overrides, ``memory`` the input-size check of a profile
sweep, ``table`` the names of each setting in every place (README's "Names" table), ``variants`` the
``[[variants]]`` entries of a gate config (reduced-precision candidates and their rules)."""

from seqgate.settings.memory import check_input_memory
from seqgate.settings.table import CLI, CONFIG, PYTHON, SETTINGS, Setting, parse_settings, setting
from seqgate.settings.tolerance import ToleranceOverride, Tolerances, parse_override, parse_overrides
from seqgate.settings.values import (
    Budget,
    Problems,
    SettingProblems,
    make_budget,
    parse_budgets,
    parse_int_list,
    parse_percentile,
    parse_seed,
    parse_tolerance,
    read_toml,
)
from seqgate.settings.variants import VARIANT_KINDS, VariantRule, parse_variants

__all__ = [
    "CLI", "CONFIG", "PYTHON", "SETTINGS", "VARIANT_KINDS", "Budget", "Problems", "Setting", "SettingProblems",
    "ToleranceOverride", "Tolerances", "VariantRule", "check_input_memory", "make_budget", "parse_budgets",
    "parse_int_list", "parse_override", "parse_overrides", "parse_percentile", "parse_seed",
    "parse_settings", "parse_tolerance", "parse_variants", "read_toml", "setting",
]
