"""The values of run-file keys and flags: each checked against its option's kind, choices and bounds.

In: an :class:`~raytrace.cli.runfile.Option` and a value from a TOML run file (already typed) or a
flag (text). Out: the value of the option's kind, or an InputError naming where it came from
and what is expected. TOML has numbers: a run file's "1e-14" or 7.0 for a count is a mistake,
not a number to guess; a flag's text is parsed.
"""

import math

from raytrace.core.errors import InputError


class NumberOrText:
    """Option kind: a number, or text (a dataset path) when it does not read as one."""


def convert(option, value, where, from_flag=False):
    """The value of an option, checked: one value of its kind, or for a listable option a
    list of them (a TOML list, or a flag's comma-separated text)."""
    if option.listable:
        if isinstance(value, list):
            items = value
        elif from_flag and isinstance(value, str) and "," in value:
            items = [item.strip() for item in value.split(",")]
        else:
            return _convert_one(option, value, where, from_flag)
        if not items:
            raise InputError(f"{where}: expected one value or a non-empty list, got {value!r}")
        converted = [_convert_one(option, item, where, from_flag) for item in items]
        return converted[0] if len(converted) == 1 else converted
    return _convert_one(option, value, where, from_flag)


def _convert_one(option, value, where, from_flag):
    value = _checked_kind(option, value, where, from_flag)
    if option.choices and value not in option.choices:
        raise InputError(f"{where}: {value!r} is not one of {', '.join(str(c) for c in option.choices)}")
    return value


def _checked_kind(option, value, where, from_flag):
    """``value`` as ``option``'s kind. A flag's text is parsed; a run file's value must already be of
    the kind (TOML has numbers: "1e-14" or 7.0 for a count is a mistake, not a number to guess)."""
    kind = option.kind
    if option.path and kind is str and value == "":
        return None  # an output switched off (a run file's, from the command line)
    try:
        if not from_flag and kind in (int, float) and (isinstance(value, str) or (kind is int and isinstance(value, float))):
            raise TypeError
        if kind is bool:
            if isinstance(value, bool):
                return value
            raise TypeError
        if kind is list and option.numbers:
            return _number_list(value, from_flag)
        if kind is list:
            if isinstance(value, str):
                return [value]
            if isinstance(value, list) and all(isinstance(v, str) for v in value) and value:
                return list(value)
            raise TypeError
        if kind is int:
            if isinstance(value, bool) or (isinstance(value, float) and not value.is_integer()):
                raise TypeError
            return int(value)
        if kind is float:
            if isinstance(value, bool):
                raise TypeError
            number = float(value)
            if not math.isfinite(number):
                raise TypeError
            return number
        if kind is str:
            if not isinstance(value, str) or not value:
                raise TypeError
            return value
        if kind is NumberOrText:
            if isinstance(value, bool) or not isinstance(value, (int, float, str)) or value == "":
                raise TypeError
            if isinstance(value, str):
                try:
                    value = float(value)
                except ValueError:
                    return value
            if not math.isfinite(value):
                raise TypeError
            return float(value)
    except (TypeError, ValueError):
        pass
    expected = {bool: "true or false", list: "a list of numbers" if option.numbers else "a list of strings",
                int: "a whole number",
                float: "a finite number", str: "a non-empty string",
                NumberOrText: "a number or the path of a dataset"}[kind]
    if option.listable:
        expected += " (or a list of them, one per file)"
    raise InputError(f"{where}: expected {expected}, got {value!r}")


def _number_list(value, from_flag):
    """A non-empty list of finite numbers: a TOML list of numbers, or flag texts (each comma-separated too)."""
    items = value if isinstance(value, list) else [value]
    if from_flag:
        items = [piece.strip() for item in items for piece in str(item).split(",") if piece.strip()]
    numbers = []
    for item in items:
        if isinstance(item, bool) or not (from_flag or isinstance(item, (int, float))):
            raise TypeError
        number = float(item)
        if not math.isfinite(number):
            raise TypeError
        numbers.append(number)
    if not numbers:
        raise TypeError
    return numbers


def check_range(option, value):
    if isinstance(value, list):
        for item in value:
            check_range(option, item)
        return
    if value is None or option.kind not in (int, float):
        return
    if value in option.forbidden:
        raise InputError(f"{option.key} ({option.flag}): {value!r} is not allowed ({option.help})")
    if option.at_least is not None and value < option.at_least:
        raise InputError(f"{option.key} ({option.flag}): expected a value >= {option.at_least:g}, got {value!r}")
    if option.at_most is not None and value > option.at_most:
        raise InputError(f"{option.key} ({option.flag}): expected a value <= {option.at_most:g}, got {value!r}")
    if option.above is not None and value <= option.above:
        raise InputError(f"{option.key} ({option.flag}): expected a value > {option.above:g}, got {value!r}")


