"""Robot spec files (the JSON format of `foray register`, documented in DEVELOPERS.md) as
RobotSpec messages: each action carries its limits, enums are lower-case names ("silu"),
coverage settings sit under "coverage". Unknown keys are errors that name the key."""

import json

from google.protobuf import json_format

from ._stubs import types_pb2

_TOP = ("name", "control_period_s", "state", "action", "model", "training", "planner", "objective", "coverage",
        "success_return", "seed")


def _choice_names(enum_type):
    """{"silu": "ACTIVATION_SILU", ...}: the value names after the enum's common prefix."""
    prefix = len(enum_type.values[0].name) - len("UNSPECIFIED")
    return {v.name[prefix:].lower(): v.name for v in enum_type.values[1:]}


def _settings(value, descriptor, path):
    if not isinstance(value, dict):
        raise ValueError(f"{path}: {value!r} is not an object")
    out = {}
    for key, v in value.items():
        field = descriptor.fields_by_name.get(key)
        if field is None:
            raise ValueError(f"{path}.{key}: unknown key; {path} has {', '.join(descriptor.fields_by_name)}")
        if field.enum_type is not None:
            choices = _choice_names(field.enum_type)
            if v not in choices:
                raise ValueError(f"{path}.{key}: {v!r} is not one of {', '.join(choices)}")
            out[key] = choices[v]
        elif field.message_type is not None:
            out[key] = _settings(v, field.message_type, f"{path}.{key}")
        else:
            out[key] = v
    return out


def _seed(value):
    if isinstance(value, bool) or not isinstance(value, int) or not 0 <= value < 2 ** 64:
        raise ValueError(f"seed: {value!r} is not a whole number in 0..2^64-1")
    return str(value)  # the protobuf JSON form of a uint64


def spec_from_dict(d):
    """A RobotSpec from a dict in the spec-file format; ValueError names what is wrong."""
    unknown = [k for k in d if k not in _TOP]
    if unknown:
        raise ValueError(f"{unknown[0]}: unknown key; the top level has {', '.join(_TOP)}")
    for key in ("name", "control_period_s", "state", "action"):
        if key not in d:
            raise ValueError(f"{key}: required key is missing")
    out = {"name": d["name"], "control_period_s": d["control_period_s"],
           **({"success_return": d["success_return"]} if "success_return" in d else {}),
           **({"seed": _seed(d["seed"])} if "seed" in d else {}),
           "state": [], "state_limits": [], "action": [], "action_limits": []}
    for i, s in enumerate(d["state"]):
        extra = set(s) - {"label", "unit", "min", "max"}
        if extra:
            raise ValueError(f"state[{i}].{sorted(extra)[0]}: unknown key")
        out["state"].append({k: s[k] for k in ("label", "unit") if k in s})
        if "min" in s or "max" in s:  # a stop the state cannot pass (spec.state_limits)
            if "min" in s and "max" in s and not s["max"] >= s["min"]:
                raise ValueError(f"state[{i}].max: {s['max']} is below min {s['min']}")
            out["state_limits"].append({"index": i, **{k: s[k] for k in ("min", "max") if k in s}})
    for i, a in enumerate(d["action"]):
        extra = set(a) - {"label", "unit", "min", "max", "max_step"}
        if extra:
            raise ValueError(f"action[{i}].{sorted(extra)[0]}: unknown key")
        if "min" not in a or "max" not in a:
            raise ValueError(f"action[{i}]: an action needs \"min\" and \"max\" (its limits, in its unit)")
        out["action"].append({k: a[k] for k in ("label", "unit") if k in a})
        out["action_limits"].append({k: a[k] for k in ("min", "max", "max_step") if k in a})
    descriptor = types_pb2.RobotSpec.DESCRIPTOR
    for section in ("model", "training", "planner", "objective"):
        if section in d:
            out[section] = _settings(d[section], descriptor.fields_by_name[section].message_type, section)
    for key, v in d.get("coverage", {}).items():
        if key not in ("indices", "lower", "upper", "cells"):
            raise ValueError(f"coverage.{key}: unknown key; coverage has indices, lower, upper, cells")
        out[f"coverage_{key}"] = v
    try:
        return json_format.ParseDict(out, types_pb2.RobotSpec())
    except json_format.ParseError as e:
        raise ValueError(str(e)) from None


def load_spec(path):
    """Reads a spec file; ValueError names the file and what is wrong."""
    with open(path) as f:
        text = f.read((1 << 20) + 1)
    if len(text) > 1 << 20:
        raise ValueError(f"{path}: larger than 1 MiB")
    try:
        return spec_from_dict(json.loads(text))
    except (ValueError, TypeError, AttributeError) as e:
        raise ValueError(f"{path}: {e}") from None
