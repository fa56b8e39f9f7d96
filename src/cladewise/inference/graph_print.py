"""A canonical text of a PyTensor graph's structure, before any rewriting.

The compile cache (:mod:`cladewise.inference.compile_cache`) uses it to find a
compiled model without first rewriting and compiling the graph in PyTensor (seconds
for a model with specimens). The text names every node's op with its type and all
its parameters, how nodes are wired, every type (dtype and static shape), and each
root variable: a constant by the SHA-256 of its value, a shared variable or an input
by name. Two graphs with the same text compute the same function of their roots.

Anything it cannot describe exactly (an op parameter whose only printout is a memory
address) gives ``None``: no text, so the caller takes its slow, exact path.
"""

from __future__ import annotations

import hashlib
import types
from typing import Any

import numpy as np

__all__ = ["structure_text"]


class _Opaque(Exception):
    """A value that has no exact printout."""


def _value(v: Any, seen: dict) -> str:
    from pytensor.graph.fg import FunctionGraph
    from pytensor.graph.op import Op

    if v is None or isinstance(v, (bool, int, float, complex, str, bytes)):
        return repr(v)
    if isinstance(v, (np.generic, np.dtype)):
        return f"{type(v).__name__}:{v!r}"
    if isinstance(v, np.ndarray):
        return f"array:{v.dtype}:{v.shape}:{hashlib.sha256(np.ascontiguousarray(v).tobytes()).hexdigest()}"
    if isinstance(v, (tuple, list, frozenset, set)):
        items = [_value(x, seen) for x in v]
        items = sorted(items) if isinstance(v, (set, frozenset)) else items
        return f"{type(v).__name__}({','.join(items)})"
    if isinstance(v, dict) or type(v).__name__ == "frozendict":
        return "{" + ",".join(sorted(f"{_value(k, seen)}:{_value(x, seen)}" for k, x in v.items())) + "}"
    if isinstance(v, Op) or getattr(type(v), "__props__", None) is not None:
        return _op(v, seen)  # ops, and parameter objects declared like ops
    if isinstance(v, FunctionGraph):
        return "fgraph[" + _graph(list(v.outputs), list(v.inputs), seen) + "]"
    if isinstance(v, (type, types.FunctionType, types.BuiltinFunctionType)):
        name = f"{v.__module__}.{v.__qualname__}"
        if "<" in name or getattr(v, "__closure__", None):  # a lambda or closure: its name is not enough
            raise _Opaque(name)
        return name
    text = repr(v)  # types (TensorType ...) and small value objects print exactly
    if " at 0x" in text or (text.startswith("<") and text.endswith(">")):
        raise _Opaque(text)
    return f"{type(v).__name__}:{text}"


def _op(op: Any, seen: dict) -> str:
    cls = type(op)
    name = f"{cls.__module__}.{cls.__qualname__}"
    props = getattr(cls, "__props__", None)
    if props is not None:
        fields = {p: getattr(op, p) for p in props}
    else:  # no declared parameters: describe its whole state (caches excepted)
        fields = {k: x for k, x in vars(op).items() if not k.startswith("_")}
    if id(op) in seen:
        return seen[id(op)]
    body = ",".join(f"{k}={_value(x, seen)}" for k, x in sorted(fields.items()))
    seen[id(op)] = out = f"{name}{{{body}}}"
    return out


def _graph(outputs: list, inputs: list | None, seen: dict) -> str:
    from pytensor.compile.sharedvalue import SharedVariable
    from pytensor.graph.basic import Constant
    from pytensor.graph.traversal import graph_inputs, io_toposort

    roots = list(inputs) if inputs is not None else list(graph_inputs(outputs))
    ids: dict[int, int] = {}
    lines = []

    def ref(var: Any) -> int:
        if id(var) not in ids:
            if isinstance(var, Constant):
                lines.append(f"const {var.type} {_value(np.asarray(var.data), seen)}")
            elif isinstance(var, SharedVariable):
                lines.append(f"shared {var.name!r} {var.type}")
            elif var.owner is None:
                pos = roots.index(var) if inputs is not None and var in roots else -1
                lines.append(f"input {pos} {var.name!r} {var.type}")
            else:  # pragma: no cover - toposort visits owners first
                raise _Opaque("variable seen before its node")
            ids[id(var)] = len(ids)
        return ids[id(var)]

    for var in roots:
        ref(var)
    for node in io_toposort(roots, outputs):
        ins = [ref(x) for x in node.inputs]
        outs = []
        for out in node.outputs:
            ids[id(out)] = len(ids)
            outs.append(f"{ids[id(out)]}:{out.type}")
        lines.append(f"{_op(node.op, seen)} {ins} -> {outs}")
    lines.append(f"outputs {[ref(o) for o in outputs]}")
    return "\n".join(lines)


def structure_text(outputs: list) -> str | None:
    """The structure of the graphs computing ``outputs``, as text (``None``: not exact).

    Parameters
    ----------
    outputs : list of pytensor Variable
        The graphs' outputs; their roots are found by walking up.
    """
    try:
        return _graph(list(outputs), None, {})
    except _Opaque:
        return None
