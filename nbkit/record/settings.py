"""Parameter-group settings while recording: which keys are stored (fixed at the start) and each step's values.

A setting is a numeric parameter-group key (lr, momentum, dampening, weight_decay, eps, ...): a Python
int or float (not a bool), a one-element tensor, or a tuple of those, split into one stored setting per
element (betas -> betas.0, betas.1; names from nbkit.store.layout.setting_name). Any other value (None,
a string, a bool, a list of tensors) is kept in the metadata's param_groups at the start and listed in
meta["settings_not_replayed"] with the reason.
"""
from __future__ import annotations

import numbers

import numpy as np
import torch

from nbkit.store.layout import SettingColumn, setting_name


def is_number(value) -> bool:
    """A number a setting can hold: an int or float (not a bool), or a one-element non-bool tensor."""
    if isinstance(value, torch.Tensor):
        return value.numel() == 1 and value.dtype != torch.bool and not value.is_complex()
    return isinstance(value, numbers.Real) and not isinstance(value, bool)


def setting_columns_of(param_groups: list[dict]) -> tuple[list[SettingColumn], dict[str, str]]:
    """(the settings to store, in first-seen order over the groups; {key: why it is not stored}).

    Bools (nesterov, amsgrad, maximize, ...) are switches, not settings, and are not listed as missing.
    """
    columns: dict[str, SettingColumn] = {}
    skipped: dict[str, str] = {}
    for group in param_groups:
        for key, value in group.items():
            if key == "params" or isinstance(value, bool) or value is None:
                continue
            if not isinstance(key, str):
                skipped[str(key)] = "the key is not a string"
            elif is_number(value):
                tail = key.rpartition(".")[2]
                if "." in key and tail.isdigit():
                    skipped[key] = "its name ends in .<digits>, the stored form of a tuple's element"
                else:
                    columns.setdefault(key, SettingColumn(key, key))
            elif isinstance(value, tuple) and value and all(is_number(v) for v in value):
                for i in range(len(value)):
                    columns.setdefault(setting_name(key, i), SettingColumn(setting_name(key, i), key, i))
            else:
                skipped[key] = (f"its value ({type(value).__name__}) is not a number or a tuple of numbers: "
                                "the start value is kept in param_groups, replays do not re-apply it")
    for key in list(skipped):
        if any(c.key == key for c in columns.values()):
            del skipped[key]            # a number in another group: stored, NaN where it is not one
    return list(columns.values()), skipped


class SettingsReader:
    """Reads the stored settings of every group after each step: read(param_groups) -> (G, S) float64.

    The cost is one small array and a loop over groups × settings; a value that is missing or not a
    number at that step reads as NaN.
    """

    def __init__(self, columns: list[SettingColumn]):
        self.columns = [(c.key, c.index) for c in columns]

    def read(self, param_groups: list[dict]) -> np.ndarray:
        values = np.full((len(param_groups), len(self.columns)), np.nan)        # (groups, settings)
        for g, group in enumerate(param_groups):
            for s, (key, index) in enumerate(self.columns):
                value = group.get(key)
                try:
                    values[g, s] = value if index is None else value[index]
                except (TypeError, ValueError, IndexError, RuntimeError):
                    pass                # not a number at this step: NaN
        return values
