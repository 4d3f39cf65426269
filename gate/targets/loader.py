"""Read and validate one target-profile YAML file into a ``TargetProfile``.

Every problem of a file is collected (file:line: key.path: message, with a
"did you mean" for misspelled keys and names) and raised as one ``ConfigError``.
The README (docs/targets.md) documents the schema; keep the two in step.
"""

from __future__ import annotations

import math
from dataclasses import replace
from functools import lru_cache
from pathlib import Path
from types import MappingProxyType

from yaml.nodes import Node, ScalarNode

from gate.targets.spec import (
    CONV_KINDS,
    DATAFLOWS,
    ENGINES,
    EPILOGUE_ENGINES,
    FUSION_EPILOGUES,
    FUSION_FOLDS,
    FUSION_PRODUCERS,
    PRECISION_BITS,
    EngineSpec,
    FusionSpec,
    PrecisionSpec,
    TargetProfile,
    normal_precision,
)
from gate.yamlconf import (
    Section,
    YamlDocument,
    parse_yaml_bytes,
    read_yaml_file,
    scalar_value,
    suggest,
)


def load_target_file(path: str | Path, source: str | None = None) -> TargetProfile:
    """Load the target profile in ``path``; ConfigError listing every problem found."""
    return parse_target(read_yaml_file(path), source)


def parse_target_bytes(raw: bytes, shown: str, source: str | None = None) -> TargetProfile:
    """Load a target profile from bytes (``shown`` names it in messages)."""
    return parse_target(parse_yaml_bytes(raw, shown), source)


def parse_target(doc: YamlDocument, source: str | None = None) -> TargetProfile:
    """Build a ``TargetProfile`` from a composed document, or raise one ConfigError."""
    root = doc.root_mapping()
    name = root.get_str("name", required=True)
    description = root.get_str("description", "")
    clock_hz = root.get_quantity("clock", "Hz", required=True)
    array = _read_array(root)
    buffers = _read_buffers(root)
    dram_bytes_per_s = _read_dram(root)
    energy = _read_energy(root)
    layer_overhead_s = root.get_quantity("layer_overhead", "s", 0.0,
                                         typical=PLAUSIBLE["layer_overhead"])
    # A clock that is present but invalid is reported once; the vector unit, which
    # defaults to it, does not add "required key is missing" (its value is never used).
    vector_clock = clock_hz if clock_hz is not None or not root.has("clock") else 1.0
    vector = _read_engine(root, "vector_unit", vector_clock, required=False)
    host = _read_engine(root, "host", None, required=True)
    # Built-in targets skip the op-type check (tests/test_targets.py checks their placements
    # against onnx.defs): asking onnx for every op schema costs seconds on `roofgate targets`.
    placement = _read_placement(root, vector is not None or root.has("vector_unit"),
                                check_op_types=source != "builtin")
    weights_resident = root.get_bool("weights_resident", False)
    fusion = _read_fusion(root, vector is not None or root.has("vector_unit"))
    root.finish()
    if name is not None and not _valid_name(name):
        root.bad("name", f"'{name}' is not a valid target name; use letters, digits, '-', '_' and '.'")
    if clock_hz is not None and clock_hz <= 0:
        root.bad("clock", "must be above zero")
    doc.raise_if_problems()
    rows, cols, dataflow, precisions = array
    return _figures_in_range(doc, TargetProfile(
        name=name or "", description=description or "", source=source or doc.path,
        clock_hz=float(clock_hz or 0.0), pe_rows=rows, pe_cols=cols, dataflow=dataflow,
        param_buffer_bytes=buffers[0], activation_buffer_bytes=buffers[1],
        unified_buffer_bytes=buffers[2], dram_bytes_per_s=dram_bytes_per_s,
        precisions=MappingProxyType(precisions), buffer_energy_j_per_byte=energy[0],
        noc_energy_j_per_byte=energy[1], dram_energy_j_per_byte=energy[2],
        static_power_w=energy[3], layer_overhead_s=float(layer_overhead_s or 0.0),
        vector=vector, host=host, placement=MappingProxyType(placement),
        weights_resident=bool(weights_resident), fusion=fusion,
    ))


# The range a target figure (in SI base units) may take when not zero. Beyond it, figures
# derived from it (1 / bandwidth, bytes x energy, cycles / clock) can overflow a float to
# infinity or round to zero. Common practice, no source: real figures lie within 1e-18..1e18.
FIGURE_MIN = 1e-30
FIGURE_MAX = 1e30


def _figures_in_range(doc: YamlDocument, target: TargetProfile) -> TargetProfile:
    """``target`` unchanged, or one ConfigError naming each figure out of range.

    Why: a figure that passes as finite may still give an infinite latency or
    energy (``bandwidth: 1e-320 B/s``), and no infinity may reach a report.
    """
    figures: list[tuple[str, float, str]] = [
        ("clock", target.clock_hz, "Hz"), ("dram.bandwidth", target.dram_bytes_per_s, "B/s"),
        ("energy.buffer_per_byte", target.buffer_energy_j_per_byte, "J"),
        ("energy.noc_per_byte", target.noc_energy_j_per_byte, "J"),
        ("energy.dram_per_byte", target.dram_energy_j_per_byte, "J"),
        ("energy.static_power", target.static_power_w, "W"),
        ("layer_overhead", target.layer_overhead_s, "s")]
    for name, spec in target.precisions.items():
        key = f"array.precisions.{name}"
        figures += [(f"{key}.macs_per_pe_per_cycle", spec.macs_per_pe_per_cycle, ""),
                    (f"{key}.energy_per_mac", spec.mac_energy_j, "J")]
    for key, engine in (("vector_unit", target.vector), ("host", target.host)):
        if engine is not None:
            figures += [(f"{key}.ops_per_cycle", engine.ops_per_cycle, ""),
                        (f"{key}.clock", engine.clock_hz, "Hz"),
                        (f"{key}.energy_per_op", engine.op_energy_j, "J"),
                        (f"{key}.layer_overhead", engine.overhead_s, "s")]
    for key, value, unit in figures:
        if value != 0 and not FIGURE_MIN <= abs(value) <= FIGURE_MAX:
            doc.problem(None, key, f"{value:g} {unit} is outside the range a target figure may "
                        f"take ({FIGURE_MIN:g} to {FIGURE_MAX:g} {unit}); figures derived from "
                        "it would overflow".replace("  ", " "))
    doc.raise_if_problems()
    warnings = implausible_figures(figures + _buffer_figures(target))
    return replace(target, warnings=tuple(f"{doc.path}: {w}" for w in warnings))


# Where the figures of an edge accelerator lie, per key (the last part of its key path),
# in SI base units; a figure outside is most likely a wrong unit ('0.6 J' per MAC). Energy:
# Horowitz, ISSCC 2014 (45 nm), from memory: an 8-bit add 0.03 pJ, a 32-bit float multiply
# 3.7 pJ, an 8 KB SRAM 64-bit read 10 pJ, a DRAM 64-bit access 1.3-2.6 nJ; the ranges
# below are a decade or more wider on each side. Clocks, bandwidths, buffers, static power
# and overheads: common practice, no source.
PLAUSIBLE: dict[str, tuple[float, float]] = {
    "clock": (1e6, 1e10), "bandwidth": (1e6, 1e13),
    "energy_per_mac": (1e-16, 1e-10), "energy_per_op": (1e-16, 1e-10),
    "buffer_per_byte": (1e-16, 1e-10), "noc_per_byte": (1e-16, 1e-10),
    "dram_per_byte": (1e-14, 1e-8), "static_power": (1e-7, 1e3),
    "layer_overhead": (1e-10, 1e-2), "buffer": (256.0, 2.0**34),
}


def implausible_figures(figures: list[tuple[str, float, str]]) -> list[str]:
    """One warning per figure outside the range ``PLAUSIBLE`` gives its key."""
    out = []
    for key, value, unit in figures:
        low, high = PLAUSIBLE.get(key.rsplit(".", 1)[-1], (0.0, math.inf))
        if value != 0 and unit and not low <= abs(value) <= high:
            out.append(f"{key}: {value:g} {unit} is far outside what edge accelerators use "
                       f"({low:g} to {high:g} {unit}); check the unit")
    return out


def _buffer_figures(target: TargetProfile) -> list[tuple[str, float, str]]:
    sizes = (("buffers.parameter", target.param_buffer_bytes),
             ("buffers.activation", target.activation_buffer_bytes),
             ("buffers.unified", target.unified_buffer_bytes))
    return [(f"{key}.buffer", float(value), "B") for key, value in sizes if value]


def _valid_name(name: str) -> bool:
    return bool(name) and all(c.isalnum() or c in "-_." for c in name)


def _read_array(root: Section) -> tuple[int, int, str, dict[str, PrecisionSpec]]:
    array = root.get_section("array", required=True)
    if array is None:
        return 0, 0, "", {}
    rows = array.get_int("rows", 0, required=True, minimum=1) or 0
    cols = array.get_int("cols", 0, required=True, minimum=1) or 0
    dataflow = array.get_str("dataflow", "", required=True, choices=list(DATAFLOWS)) or ""
    precisions: dict[str, PrecisionSpec] = {}
    for name, sub, node in array.get_mapping_sections("precisions"):
        spec = _read_precision(array, name, sub, node)
        if spec is not None:
            precisions[normal_precision(name) or name] = spec
    if not precisions and array.has("precisions"):
        array.bad("precisions", "declare at least one precision, e.g. 'int8: {macs_per_pe_per_cycle: 1, "
                                "energy_per_mac: 0.2 pJ}'")
    elif not array.has("precisions"):
        array.bad("precisions", "required key is missing")
    array.finish()
    return rows, cols, dataflow, precisions


def _read_precision(array: Section, name: str, sub: Section | None,
                    node: Node) -> PrecisionSpec | None:
    path = f"{array.key_path}.precisions.{name}"
    canonical = normal_precision(name)
    if canonical is None:
        hint = suggest(name, list(PRECISION_BITS))
        array.doc.problem(node, path, f"unknown precision '{name}'{hint}; "
                                      f"known: {', '.join(PRECISION_BITS)}")
        return None
    if sub is None:
        array.doc.problem(node, path, "expected a mapping with macs_per_pe_per_cycle and "
                                      "energy_per_mac")
        return None
    rate = sub.get_number("macs_per_pe_per_cycle", required=True, minimum=0.0)
    energy = sub.get_quantity("energy_per_mac", "J", required=True,
                              typical=PLAUSIBLE["energy_per_mac"])
    sub.finish()
    if rate is not None and rate <= 0:
        sub.bad("macs_per_pe_per_cycle", "must be above zero")
        return None
    if rate is None or energy is None:
        return None
    return PrecisionSpec(macs_per_pe_per_cycle=rate, mac_energy_j=energy)


def _read_buffers(root: Section) -> tuple[int, int, int]:
    buffers = root.get_section("buffers", required=True)
    if buffers is None:
        return 0, 0, 0
    param = _whole_bytes(buffers, "parameter")
    act = _whole_bytes(buffers, "activation")
    unified = _whole_bytes(buffers, "unified")
    buffers.finish()
    if unified and (param or act):
        buffers.bad("unified", "declare either one unified buffer or separate parameter and "
                               "activation buffers, not both")
    elif not unified and not (param and act):
        missing = "parameter" if not param else "activation"
        buffers.bad(missing, "declare both 'parameter' and 'activation' buffer sizes above zero, "
                             "or one 'unified' buffer")
    return param, act, unified


def _whole_bytes(section: Section, key: str) -> int:
    value = section.get_quantity(key, "B", 0.0, typical=PLAUSIBLE["buffer"])
    if value is None:
        return 0
    if value != math.floor(value):
        section.bad(key, f"must be a whole number of bytes, got {value:g}")
        return 0
    return int(value)


def _read_dram(root: Section) -> float:
    dram = root.get_section("dram", required=True)
    if dram is None:
        return 0.0
    bandwidth = dram.get_quantity("bandwidth", "B/s", required=True,
                                  typical=PLAUSIBLE["bandwidth"])
    dram.finish()
    if bandwidth is not None and bandwidth <= 0:
        dram.bad("bandwidth", "must be above zero")
    return float(bandwidth or 0.0)


def _read_energy(root: Section) -> tuple[float, float, float, float]:
    energy = root.get_section("energy", required=True)
    if energy is None:
        return 0.0, 0.0, 0.0, 0.0
    buffer_j, noc_j, dram_j = (
        energy.get_quantity(key, "J", required=True, typical=PLAUSIBLE[key])
        for key in ("buffer_per_byte", "noc_per_byte", "dram_per_byte"))
    static_w = energy.get_quantity("static_power", "W", 0.0, typical=PLAUSIBLE["static_power"])
    energy.finish()
    return (float(buffer_j or 0.0), float(noc_j or 0.0), float(dram_j or 0.0),
            float(static_w or 0.0))


def _read_engine(root: Section, key: str, default_clock_hz: float | None,
                 required: bool) -> EngineSpec | None:
    section = root.get_section(key, required=required)
    if section is None:
        return None
    ops = section.get_number("ops_per_cycle", required=True, minimum=0.0)
    clock = section.get_quantity("clock", "Hz", default_clock_hz, required=default_clock_hz is None)
    energy = section.get_quantity("energy_per_op", "J", required=True,
                                  typical=PLAUSIBLE["energy_per_op"])
    overhead = section.get_quantity("layer_overhead", "s", 0.0,
                                    typical=PLAUSIBLE["layer_overhead"])
    section.finish()
    if ops is not None and ops <= 0:
        section.bad("ops_per_cycle", "must be above zero")
        return None
    if clock is not None and clock <= 0:
        section.bad("clock", "must be above zero")
        return None
    if ops is None or clock is None or energy is None:
        return None
    return EngineSpec(ops_per_cycle=ops, clock_hz=clock, op_energy_j=energy,
                      overhead_s=float(overhead or 0.0))


def _read_placement(root: Section, has_vector: bool, *,
                    check_op_types: bool = True) -> dict[str, str]:
    placement: dict[str, str] = {}
    for op_type, _, node in root.get_mapping_sections("placement"):
        path = f"placement.{op_type}"
        value = scalar_value(node) if isinstance(node, ScalarNode) else None
        if not isinstance(value, str) or value not in ENGINES:
            shown = str(node.value) if isinstance(node, ScalarNode) else "a list or mapping"
            hint = suggest(shown, list(ENGINES))
            root.doc.problem(node, path, f"'{shown}' is not one of {', '.join(ENGINES)}{hint}")
            continue
        if value == "vector" and not has_vector:
            root.doc.problem(node, path, "placed on 'vector' but the target declares no "
                                         "vector_unit; add a 'vector_unit' section or place it "
                                         "on 'array' or 'host'")
            continue
        if check_op_types and not _placeable(op_type):
            hint = suggest(op_type, sorted(_onnx_op_types()) + list(CONV_KINDS.values()))
            root.doc.problem(node, path, f"'{op_type}' is not an ONNX op type{hint}; write ops of "
                                         f"other domains as 'domain:OpType', or use "
                                         f"{' or '.join(CONV_KINDS.values())}")
            continue
        placement[op_type] = value
    return placement


def _placeable(key: str) -> bool:
    """An ONNX op type, 'domain:OpType', or a kind of convolution (``depthwise-conv``)."""
    return ":" in key or key in _onnx_op_types() or key in CONV_KINDS.values()


def _read_fusion(root: Section, has_vector: bool) -> FusionSpec | None:
    """The ``fusion:`` section: op types by role, checked against what the grouper understands."""
    section = root.get_section("fusion")
    if section is None:
        return None
    producers = _fusion_ops(section, "producers", FUSION_PRODUCERS, required=True)
    fold = _fusion_ops(section, "fold", FUSION_FOLDS)
    epilogue = _fusion_ops(section, "epilogue", FUSION_EPILOGUES)
    engine = section.get_str("epilogue_engine", "output-path", choices=list(EPILOGUE_ENGINES))
    max_ops = section.get_int("max_epilogue_ops", 2, minimum=0)
    pad = section.get_bool("pad_into_conv", False)
    section.finish()
    if engine == "vector" and not has_vector:
        section.bad("epilogue_engine", "'vector' but the target declares no vector_unit; add a "
                                       "'vector_unit' section or use 'output-path'")
    return FusionSpec(producers=frozenset(producers), fold=frozenset(fold),
                      epilogue=frozenset(epilogue), epilogue_engine=engine or "output-path",
                      max_epilogue_ops=2 if max_ops is None else max_ops,
                      pad_into_conv=bool(pad))


def _fusion_ops(section: Section, key: str, known: tuple[str, ...],
                required: bool = False) -> list[str]:
    """A list of op types for one fusion role; unknown or misplaced names are reported."""
    names = section.get_str_list(key, [], required=required) or []
    accepted = []
    for name in names:
        if name in known or ":" in name:  # another domain's op: the user vouches for it
            accepted.append(name)
        elif name in _onnx_op_types():
            hint = suggest(name, list(known))
            section.bad(key, f"'{name}' cannot be fused as {key.rstrip('s')}{hint}; "
                             f"known: {', '.join(known)}")
        else:
            hint = suggest(name, list(known)) or suggest(name, sorted(_onnx_op_types()))
            section.bad(key, f"'{name}' is not an ONNX op type{hint}")
    return accepted


@lru_cache(maxsize=1)
def _onnx_op_types() -> frozenset[str]:
    """Every op type in ONNX's own operator sets (the names a placement key may use)."""
    import onnx.defs

    return frozenset(schema.name for schema in onnx.defs.get_all_schemas_with_history())
