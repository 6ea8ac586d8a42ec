"""Settings tables: one row per parameter (type, default, range, meaning), validated in one place.

Every layer describes its parameters with `SettingSpec` rows and checks a frozen settings dataclass
against them with `validate_fields`; the ROS nodes turn the same rows into parameter descriptors
(riskbound.ros.setting_parameters), so a value rejected on the robot is rejected for the same
reason in a script.
"""

from dataclasses import dataclass, fields

import numpy as np


@dataclass(frozen=True)
class SettingSpec:
    name: str
    default: object
    description: str
    low: float = None
    high: float = None
    low_open: bool = False
    high_open: bool = False
    choices: tuple = None
    rebuild: bool = False
    read_only: bool = False

    def allowed(self):
        """Human-readable allowed range, used in every rejection message."""
        if self.choices is not None:
            return "one of " + ", ".join(repr(c) for c in self.choices)
        left = "(" if self.low_open else "["
        right = ")" if self.high_open else "]"
        return f"{left}{self.low}, {self.high}{right}"

    def check(self, value):
        """Return None when `value` is allowed, else the reason it is not."""
        if self.choices is not None:
            if value not in self.choices:
                return f"{self.name}={value!r} is not allowed: must be {self.allowed()}"
            return None
        expected = type(self.default)
        if expected is float and isinstance(value, int) and not isinstance(value, bool):
            value = float(value)
        if not isinstance(value, expected) or isinstance(value, bool) != isinstance(self.default, bool):
            return f"{self.name}={value!r} has the wrong type: expected {expected.__name__}"
        if isinstance(value, float) and value != value:
            return f"{self.name}=nan is not allowed: must be in {self.allowed()}"
        too_low = self.low is not None and (value < self.low or (self.low_open and value == self.low))
        too_high = self.high is not None and (value > self.high or (self.high_open and value == self.high))
        if too_low or too_high:
            return f"{self.name}={value!r} is out of range: must be in {self.allowed()}"
        return None


def validate_fields(settings, specs_by_name):
    """Check every field of a frozen settings dataclass against its spec, in field order.

    An integer given for a float setting becomes a float (as ROS parameter files often carry them),
    and a numpy scalar the Python number it holds (as scripts computing settings often pass them);
    anything else out of type or range raises ValueError with the spec's reason.
    """
    for item in fields(settings):
        spec = specs_by_name[item.name]
        value = getattr(settings, item.name)
        if isinstance(value, (np.integer, np.floating, np.bool_)):
            value = value.item()
            object.__setattr__(settings, item.name, value)
        if isinstance(spec.default, float) and isinstance(value, int) and not isinstance(value, bool):
            object.__setattr__(settings, item.name, float(value))
        reason = spec.check(getattr(settings, item.name))
        if reason:
            raise ValueError(reason)
