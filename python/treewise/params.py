"""The scikit-learn parameter protocol, shared by treewise's estimators."""

from __future__ import annotations

from typing import Any, ClassVar, TypeVar

__all__ = ["Params"]

T = TypeVar("T", bound="Params")


def _is_default(value: object, default: object) -> bool:
    """Whether a parameter still has its default (array-likes never compare as equal)."""
    try:
        return bool(value == default)
    except (TypeError, ValueError):
        return False


class Params:
    """``get_params``, ``set_params`` and a ``repr`` that shows the non-default parameters.

    A subclass lists its constructor parameters in ``_PARAMS``; ``__init__`` only stores them.
    """

    _PARAMS: ClassVar[tuple[str, ...]] = ()

    def get_params(self, deep: bool = True) -> dict[str, Any]:
        """Return the constructor parameters."""
        return {name: getattr(self, name) for name in self._PARAMS}

    def set_params(self: T, **params: Any) -> T:
        """Set constructor parameters; returns ``self``."""
        for name, value in params.items():
            if name not in self._PARAMS:
                raise ValueError(f"unknown parameter {name!r}; the parameters are {self._PARAMS}")
            setattr(self, name, value)
        return self

    def __repr__(self) -> str:
        defaults = type(self)().get_params()
        changed = [
            f"{k}={v!r}" for k, v in self.get_params().items() if not _is_default(v, defaults[k])
        ]
        return f"{type(self).__name__}({', '.join(changed)})"
