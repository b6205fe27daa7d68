"""Run files and journal headers as earlier versions wrote them, made from current ones.

Earlier versions stored the compiled step list as ``/plan`` (``plan_json`` in the journal header)
and the run set-up as an untyped ``extra_json`` attribute (``extra`` in the journal header) with
the keys below; files written so must keep opening.
"""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import h5py

from lightloom.sequencer.model.records import RunHeader


def legacy_extra(header: RunHeader) -> dict[str, Any]:
    """The ``extra`` dict an earlier version wrote for ``header``."""
    t2 = header.factor_target_state
    return {
        "protocol_spec": header.sources.protocol_spec,
        "bench_spec": header.sources.bench_spec,
        "protocol_path": header.sources.protocol_path,
        "bench_path": header.sources.bench_path,
        "target_label": header.target_label,
        "target_state_2x2": None if t2 is None else {"real": t2.real.tolist(), "imag": t2.imag.tolist()},
        "port_labels": [p.label for p in header.ports],
        "port_sorter": [p.sorter_port for p in header.ports],
        "port_splitter": [p.splitter_port for p in header.ports],
        "port_gain": [p.gain for p in header.ports],
        "reference_device": header.reference_device,
        "wavelength_nm": header.wavelength_nm,
    }


def legacy_header_json(header: RunHeader) -> dict[str, Any]:
    """The journal header dict an earlier version wrote for ``header``."""
    data = header.to_json_dict()
    data.pop("setup")
    data["plan_json"] = data.pop("steps_json")
    data["extra"] = legacy_extra(header)
    return data


def make_legacy_runfile(path: Path, header: RunHeader) -> None:
    """Rewrite the run file at ``path`` (written by this version for ``header``) in the old layout."""
    with h5py.File(path, "r+") as f:
        f.move("steps", "plan")
        del f.attrs["setup_json"]
        f.attrs["extra_json"] = json.dumps(legacy_extra(header), sort_keys=True)
