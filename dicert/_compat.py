"""Old import paths of the recipe modules, kept working without files of their own.

The recipes live in modules named for what they hold (:mod:`dicert.certification`,
:mod:`dicert.verification`, :mod:`dicert.planning`), so that ``dicert.certify``,
``dicert.verify`` and ``dicert.plan`` are the functions users call. Code written against the
earlier layout imports ``dicert.certify`` and friends as modules; a finder on ``sys.meta_path``
(consulted only after the normal finders missed) answers exactly those three names with the
implementing module itself (so ``from dicert.certify import certify``, ``import dicert.certify
as m`` and monkeypatching act on the real module), whose class becomes :class:`RecipeModule`:
calling the module calls the recipe, so ``dicert.certify(...)`` works whichever of the two
``dicert.certify`` resolves to.

There are no shim files at the old paths on purpose: a file there would hide the rename from
git, and every branch still editing the old file would then conflict with the shim.
"""

from __future__ import annotations

import importlib
import sys
import types
from importlib.machinery import ModuleSpec
from typing import Any

#: old module path -> (implementing module, recipe function)
ALIASES = {
    "dicert.certify": ("dicert.certification", "certify"),
    "dicert.verify": ("dicert.verification", "verify"),
    "dicert.plan": ("dicert.planning", "plan"),
}


class RecipeModule(types.ModuleType):
    """Module class of a recipe module once imported under its old path: calling the module
    calls its recipe, so ``dicert.certify(...)`` works even where ``import dicert.certify``
    has bound the package attribute to the module."""

    def __call__(self, *args: Any, **kwargs: Any) -> Any:
        return getattr(self, _RECIPES[self.__name__])(*args, **kwargs)


#: implementing module -> recipe function
_RECIPES = {impl: fn for impl, fn in ALIASES.values()}


class _AliasLoader:
    """Loads an old path as the implementing module itself (one object under two names), so
    attribute reads, writes and monkeypatching act on the real module."""

    def create_module(self, spec: ModuleSpec) -> types.ModuleType:
        module = importlib.import_module(ALIASES[spec.name][0])
        if type(module) is types.ModuleType:
            module.__class__ = RecipeModule
        self._spec = module.__spec__
        return module

    def exec_module(self, module: types.ModuleType) -> None:
        # The import system stamped the alias spec on the module; give it back its own.
        module.__spec__ = self._spec


class _AliasFinder:
    """Finds only the three old recipe module paths."""

    @classmethod
    def find_spec(cls, fullname: str, path: Any = None, target: Any = None) -> ModuleSpec | None:
        if fullname in ALIASES:
            return ModuleSpec(fullname, _AliasLoader(), origin="alias")
        return None


def install() -> None:
    """Put the finder last on ``sys.meta_path`` (once)."""
    if not any(f is _AliasFinder for f in sys.meta_path):
        sys.meta_path.append(_AliasFinder)
