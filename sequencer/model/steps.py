"""The compiled step list: what to do, step by step, as plain data, and its JSON form (stored in every run file)."""

from __future__ import annotations

import json
import math
from dataclasses import asdict, dataclass, field



@dataclass(frozen=True)
class Step:
    """One reading of every detector at one analyzer setting.

    ``settings`` are the commanded element positions in ELEMENT_NAMES order (deg; the mode
    converter 1.0 = in, 0.0 = out; NaN = element not on this bench). ``port_labels`` says which
    projector each detector port nominally measures (the file stores the exact operators).
    """

    index: int
    kind: str
    pass_index: int
    point_index: int
    repeat_index: int
    settings: tuple[float, ...]
    dwell_s: float
    label: str
    port_labels: tuple[str, ...]

    @property
    def shutter_open(self) -> bool:
        return self.kind != "background"


@dataclass(frozen=True)
class StepList:
    """Everything the runner needs to execute a protocol on a bench, and nothing it must look up."""

    protocol_name: str
    bench_name: str
    element_names: tuple[str, ...]
    port_names: tuple[str, ...]
    steps: tuple[Step, ...]
    n_settings: int
    passes: int
    pass_interval_s: float
    order: str
    violations: tuple[str, ...] = field(default=())

    def to_json(self) -> str:
        """A canonical JSON text (NaN written as null), identical for identical step lists."""
        d = asdict(self)
        d["steps"] = [
            {**s, "settings": [None if math.isnan(x) else x for x in s["settings"]]} for s in d["steps"]
        ]
        return json.dumps(d, sort_keys=True, separators=(",", ":"))

    @staticmethod
    def from_json(text: str) -> "StepList":
        d = json.loads(text)
        steps = tuple(
            Step(
                **{
                    **s,
                    "settings": tuple(math.nan if x is None else float(x) for x in s["settings"]),
                    "port_labels": tuple(s["port_labels"]),
                }
            )
            for s in d.pop("steps")
        )
        return StepList(
            **{
                **d,
                "steps": steps,
                "element_names": tuple(d["element_names"]),
                "port_names": tuple(d["port_names"]),
                "violations": tuple(d.get("violations", ())),
            }
        )
