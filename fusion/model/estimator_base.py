"""The estimator contract without importing scikit-learn (docs/conventions.md items 1, 20).

:class:`ParamsMixin` gives an estimator whose ``__init__`` takes keyword-only parameters and only
assigns them:

- ``get_params(deep=True)`` and ``set_params(**params)`` with scikit-learn's semantics (nested
  ``a__b`` names for parameters that are estimators themselves), so
  ``sklearn.base.clone`` works on it;
- a ``repr`` that lists the parameters that differ from their defaults;
- learned attributes (public names ending in ``_``) that do not exist yet raise
  :class:`stations.errors.NotFittedError` (a ``ValueError`` and ``AttributeError``, so
  ``hasattr`` is False) with scikit-learn's message.

The parameter names are read from the signature of ``__init__`` (scikit-learn's
``BaseEstimator._get_param_names`` does the same); ``*args``/``**kwargs`` are refused.
"""

from __future__ import annotations

import inspect
from typing import Any, Self

from stations.errors import ConfigError, NotFittedError

__all__ = ["ParamsMixin"]


class ParamsMixin:
    """get_params / set_params / repr / not-fitted errors for keyword-only estimators."""

    @classmethod
    def _get_param_names(cls) -> list[str]:
        """Names of the ``__init__`` parameters, sorted."""
        init = cls.__init__
        if init is object.__init__:
            return []
        params = [p for p in inspect.signature(init).parameters.values() if p.name != "self"]
        for p in params:
            if p.kind in (p.VAR_POSITIONAL, p.VAR_KEYWORD):
                raise TypeError(
                    f"{cls.__name__}.__init__ must not take *args or **kwargs "
                    "(get_params could not see them)"
                )
        return sorted(p.name for p in params)

    def get_params(self, deep: bool = True) -> dict[str, Any]:
        """Parameters of this estimator.

        Parameters
        ----------
        deep : bool, default=True
            Also return the parameters of parameters that are estimators, as ``name__sub``.

        Returns
        -------
        dict
        """
        out: dict[str, Any] = {}
        for name in self._get_param_names():
            value = getattr(self, name)
            if deep and hasattr(value, "get_params") and not isinstance(value, type):
                for sub, sub_value in value.get_params().items():
                    out[f"{name}__{sub}"] = sub_value
            out[name] = value
        return out

    def set_params(self, **params: Any) -> Self:
        """Set parameters (``name`` or nested ``name__sub``); returns ``self``.

        Raises
        ------
        ConfigError
            For a name that is not a parameter; the message lists the valid names.
        """
        if not params:
            return self
        valid = self.get_params(deep=True)
        nested: dict[str, dict[str, Any]] = {}
        for key, value in params.items():
            name, _, sub = key.partition("__")
            if name not in valid:
                raise ConfigError(
                    f"Invalid parameter {name!r} for estimator {type(self).__name__}. "
                    f"Valid parameters are: {sorted(self._get_param_names())!r}."
                )
            if sub:
                nested.setdefault(name, {})[sub] = value
            else:
                setattr(self, name, value)
                valid[name] = value
        for name, sub_params in nested.items():
            valid[name].set_params(**sub_params)
        return self

    def __repr__(self) -> str:
        defaults = {
            p.name: p.default
            for p in inspect.signature(type(self).__init__).parameters.values()
            if p.name != "self"
        }
        changed = []
        for name in self._get_param_names():
            value = getattr(self, name)
            default = defaults.get(name, inspect.Parameter.empty)
            same = False
            try:
                same = bool(value == default) if not hasattr(value, "shape") else False
            except Exception:  # comparison of exotic objects: show the value
                same = False
            if not same:
                changed.append(f"{name}={value!r}")
        return f"{type(self).__name__}({', '.join(changed)})"

    def __getattr__(self, name: str) -> Any:
        # Only called when normal lookup fails: a learned attribute that fit has not set.
        if name.endswith("_") and not name.startswith("_"):
            raise NotFittedError(
                f"This {type(self).__name__} instance is not fitted yet. Call 'fit' with "
                "appropriate arguments before using this estimator."
            )
        raise AttributeError(f"{type(self).__name__!r} object has no attribute {name!r}")
