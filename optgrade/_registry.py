"""A name registry for one kind of plug-in (grounds, resonators, propagation models, ...).

Each kind keeps one :class:`Registry`; an implementation registers its class with the
registry's ``register`` decorator, and study validation and the command line read
``registry.names()``, so a name is never listed twice.
"""

from __future__ import annotations

import importlib
from collections.abc import Callable, Iterable
from typing import Generic, TypeVar

T = TypeVar("T")


class Registry(Generic[T]):
    """Classes of one plug-in kind, by their ``name`` attribute.

    Parameters
    ----------
    kind : str
        What the entries are, for messages ("ground", "propagation model", ...).
    builtin : iterable of str
        Modules (dotted paths) that define the built-in entries; imported on first use so that
        importing the registry itself stays cheap and cycle-free.
    """

    def __init__(self, kind: str, builtin: Iterable[str] = ()) -> None:
        self.kind = kind
        self._builtin = tuple(builtin)
        self._loaded = False
        self._entries: dict[str, type[T]] = {}

    def register(self, cls: type[T]) -> type[T]:
        """Class decorator: add ``cls`` under ``cls.name`` (a later one replaces an earlier)."""
        name = getattr(cls, "name", "")
        if not isinstance(name, str) or not name:
            raise ValueError(f"{cls.__name__}: a registered {self.kind} needs a non-empty name")
        self._entries[name] = cls
        return cls

    def unregister(self, name: str) -> None:
        """Remove an entry (tests that register a toy one clean up with this)."""
        self._entries.pop(name, None)

    def _load(self) -> None:
        if not self._loaded:
            self._loaded = True
            for module in self._builtin:
                importlib.import_module(module)

    def names(self) -> tuple[str, ...]:
        """Registered names, sorted."""
        self._load()
        return tuple(sorted(self._entries))

    def get(self, name: str) -> type[T]:
        """The class registered as ``name``; KeyError naming the known ones otherwise."""
        self._load()
        try:
            return self._entries[name]
        except KeyError:
            known = ", ".join(self.names())
            raise KeyError(f"unknown {self.kind} {name!r}; known: {known}") from None

    def __contains__(self, name: object) -> bool:
        self._load()
        return name in self._entries

    def choices(self) -> Callable[[], tuple[str, ...]]:
        """A callable giving the current names (for validators that must see late additions)."""
        return self.names
