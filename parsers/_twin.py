"""Plain twins of frozen slots dataclasses, for building them cheaply on per-epoch paths.

A frozen dataclass's generated ``__init__`` stores each field with ``object.__setattr__(self,
name, value)`` (a look-up by name per field); a slot-descriptor ``__set__`` per field is about
half that. Cheaper still: store the fields into an instance of a plain class with the same
``__slots__`` (plain attribute stores, specialised by the interpreter), then set its
``__class__`` to the dataclass, which Python allows between classes of the same slot layout
(Python reference, "Data model", ``__class__`` assignment). The object is then an instance of
the dataclass like any other, frozen as usual; only its construction is cheaper.

Imports nothing of ours; ``daemon/_records.py`` builds whole keyword constructors on these twins.
"""

from __future__ import annotations

from typing import Any

__all__ = ["slots_twin"]


def slots_twin(cls: type) -> Any:
    """A plain class with the slots of the frozen slots dataclass ``cls``: build ``o = twin()``,
    store every field (``o.field = value``), then ``o.__class__ = cls``.

    Raises ``TypeError`` at once where the interpreter refuses that ``__class__`` assignment.
    """
    twin = type(f"_{cls.__name__}Slots", (), {"__slots__": cls.__slots__})  # type: ignore[attr-defined]
    probe = twin()
    probe.__class__ = cls  # the same layout: allowed, else TypeError here (not on the hot path)
    return twin
