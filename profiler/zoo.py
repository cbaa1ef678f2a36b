"""What the zoo holds: families with their capabilities, and the bundled networks.

Families are found through the registry; nothing here imports a family by name.
"""

from __future__ import annotations

from typing import Any

import model_zoo

__all__ = ["zoo_listing", "family_card"]


def family_card(name: str) -> dict[str, Any]:
    """Capabilities of one family as plain data (for ``infercost zoo`` and reports)."""
    cls = model_zoo.resolve(name)
    return {
        "name": cls.name,
        "levels": sorted(str(getattr(lv, "value", lv)) for lv in cls.levels),
        "methods": sorted(cls.methods),
        "mechanism_knob": cls.mechanism_knob,
        "topologies": list(getattr(cls, "topologies", model_zoo.TOPOLOGIES)),
        "work_unit": getattr(cls, "work_unit", ""),
        "summary": (cls.__doc__ or "").strip().splitlines()[0] if cls.__doc__ else "",
    }


def zoo_listing() -> dict[str, Any]:
    """Every registered family and every network bundled inside pgmpy (loadable offline)."""
    from model_zoo.networks import bundled_networks

    return {"families": [family_card(n) for n in model_zoo.names()],
            "bundled_networks": bundled_networks()}
