"""The compiled step list: what to do, step by step, as plain data, and its JSON form (stored in every run file)."""

from __future__ import annotations

import json
from dataclasses import dataclass, field, fields

from lightloom.sequencer.model.elements import ElementSettings



@dataclass(frozen=True)
class Step:
    """One reading of every detector at one analyzer setting.

    ``settings`` are the commanded element positions (unset where the bench has no such
    element). ``port_labels`` says which projector each detector port nominally measures (the
    file stores the exact operators).
    """

    index: int
    kind: str
    pass_index: int
    point_index: int
    repeat_index: int
    settings: ElementSettings
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
        d = {f.name: getattr(self, f.name) for f in fields(self)}
        d["steps"] = [{**_shallow(s), "settings": s.settings.as_list()} for s in self.steps]
        return json.dumps(d, sort_keys=True, separators=(",", ":"))

    @staticmethod
    def from_json(text: str) -> "StepList":
        d = json.loads(text)
        steps = tuple(
            Step(
                **{
                    **s,
                    "settings": ElementSettings.from_vector(s["settings"]),
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


def _shallow(step: Step) -> dict:
    return {f.name: getattr(step, f.name) for f in fields(step)}
