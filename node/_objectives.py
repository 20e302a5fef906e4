"""Local objectives f_i: value and gradient, plus a plain-dict spec for agents.json.

An objective is built from its spec (``{"kind": ..., ...}``) with :func:`objective_from_spec`;
new kinds register with :func:`register_objective`. Kinds: ``quadratic``, ``logistic``
(L2-regularized logistic regression on local data), ``huber`` (L2-regularized Huber
regression on local data) and ``custom`` (a user function ``"package.module:function"``
returning ``(value, gradient)``). Every spec may carry ``agent`` (the owner's id) so that
errors name the agent.
"""

from __future__ import annotations

import importlib
import math
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from typing import Any, ClassVar

import numpy as np

from node._errors import ObjectiveError
from node._rng import agent_generator

__all__ = [
    "BlockObjective",
    "Custom",
    "Huber",
    "Logistic",
    "Objective",
    "Quadratic",
    "huber_data",
    "logistic_data",
    "objective_from_spec",
    "objective_kinds",
    "register_objective",
]

_KINDS: dict[str, Callable[[Mapping[str, Any]], Objective]] = {}


class Objective:
    """A smooth (or subdifferentiable) local objective on R^d."""

    kind: ClassVar[str] = ""
    dimension: int

    def value(self, x: np.ndarray) -> float:
        raise NotImplementedError

    def grad(self, x: np.ndarray) -> np.ndarray:
        raise NotImplementedError

    def value_and_grad(self, x: np.ndarray) -> tuple[float, np.ndarray]:
        return self.value(x), self.grad(x)

    def spec(self) -> dict[str, Any]:
        """Plain data (lists, floats) from which :func:`objective_from_spec` rebuilds this."""
        raise NotImplementedError

    def smoothness(self) -> float | None:
        """An upper bound on the Lipschitz constant of the gradient, or None if unknown."""
        return None


def register_objective(kind: str) -> Callable[[type], type]:
    def deco(cls: type) -> type:
        cls.kind = kind
        _KINDS[kind] = cls.from_spec
        return cls

    return deco


def objective_from_spec(spec: Mapping[str, Any]) -> Objective:
    kind = spec.get("kind")
    if kind not in _KINDS:
        raise ObjectiveError(
            f"objective kind {kind!r} is not known; expected one of {sorted(_KINDS)}"
        )
    return _KINDS[kind](spec)


def objective_kinds() -> list[str]:
    """The registered objective kinds, sorted."""
    return sorted(_KINDS)


@register_objective("quadratic")
@dataclass(frozen=True, slots=True, eq=False)
class Quadratic(Objective):
    """f(x) = 1/2 (x - t)^T Q (x - t) with Q symmetric positive definite."""

    target: np.ndarray
    curvature: np.ndarray

    @property
    def dimension(self) -> int:  # type: ignore[override]
        return int(self.target.shape[0])

    def value(self, x: np.ndarray) -> float:
        e = x - self.target
        return 0.5 * float(e @ self.curvature @ e)

    def grad(self, x: np.ndarray) -> np.ndarray:
        return self.curvature @ (x - self.target)

    def smoothness(self) -> float:
        """The spectral norm of the curvature (its largest eigenvalue when symmetric)."""
        return float(np.linalg.norm(self.curvature, 2))

    def spec(self) -> dict[str, Any]:
        return {
            "kind": "quadratic",
            "target": self.target.tolist(),
            "curvature": self.curvature.tolist(),
        }

    @classmethod
    def from_spec(cls, spec: Mapping[str, Any]) -> Quadratic:
        t = np.asarray(spec["target"], dtype=float)
        q = np.asarray(spec["curvature"], dtype=float)
        if t.ndim != 1 or q.shape != (t.shape[0], t.shape[0]):
            raise ObjectiveError(
                f"quadratic objective: target has shape {t.shape} and curvature {q.shape};"
                " expected a vector of length d and a d x d matrix"
            )
        return cls(target=t, curvature=q)


# Shared helpers for the data-driven kinds ---------------------------------------------------
def _owner(agent: int | None) -> str:
    return f"agent {agent}" if agent is not None else "an agent (no 'agent' in its spec)"


def _agent_of(spec: Mapping[str, Any]) -> int | None:
    agent = spec.get("agent")
    return None if agent is None else int(agent)


def _local_data(
    spec: Mapping[str, Any], kind: str, generate: Callable[[int, int, int, int], Any]
) -> tuple[np.ndarray, np.ndarray]:
    """Features and responses from the spec, or generated from (seed, agent, samples, dimension)."""
    agent = _agent_of(spec)
    if "features" in spec:
        key = "labels" if kind == "logistic" else "responses"
        if key not in spec:
            raise ObjectiveError(
                f"{_owner(agent)}: {kind} objective has 'features' but no {key!r};"
                " expected both, or 'seed', 'samples' and 'dimension' to generate them"
            )
        a = np.asarray(spec["features"], dtype=float)
        b = np.asarray(spec[key], dtype=float)
    elif "seed" in spec:
        missing = [k for k in ("samples", "dimension") if k not in spec]
        if missing or agent is None:
            raise ObjectiveError(
                f"{_owner(agent)}: {kind} objective generated from a seed needs 'agent',"
                f" 'samples' and 'dimension'; missing {missing or ['agent']}"
            )
        a, b = generate(int(spec["seed"]), agent, int(spec["samples"]), int(spec["dimension"]))
    else:
        raise ObjectiveError(
            f"{_owner(agent)}: {kind} objective needs local data: 'features' with"
            f" {'labels' if kind == 'logistic' else 'responses'}, or 'seed', 'samples' and"
            " 'dimension'"
        )
    if a.ndim != 2 or a.shape[0] == 0 or b.shape != (a.shape[0],):
        raise ObjectiveError(
            f"{_owner(agent)}: {kind} objective has features of shape {a.shape} and"
            f" {b.shape[0] if b.ndim == 1 else b.shape} responses; expected an m x d matrix"
            " (m >= 1) and m responses"
        )
    if not (np.all(np.isfinite(a)) and np.all(np.isfinite(b))):
        raise ObjectiveError(f"{_owner(agent)}: {kind} objective data contain NaN or inf")
    return a, b


def _nonnegative(spec: Mapping[str, Any], key: str, default: float, kind: str) -> float:
    value = float(spec.get(key, default))
    if not (math.isfinite(value) and value >= 0.0):
        raise ObjectiveError(
            f"{_owner(_agent_of(spec))}: {kind} objective {key!r} = {value}; expected a"
            " finite number >= 0"
        )
    return value


# Purposes for agent_generator: keep these numbers unique within the project.
_LOGISTIC_TRUTH = 7101
_LOGISTIC_SURVEY = 7102
_HUBER_TRUTH = 7201
_HUBER_SURVEY = 7202


def _sigmoid(z: np.ndarray) -> np.ndarray:
    # tanh form: no overflow for large |z|
    return 0.5 * (1.0 + np.tanh(0.5 * z))


def logistic_data(
    seed: int, agent: int, samples: int, dimension: int
) -> tuple[np.ndarray, np.ndarray]:
    """One agent's survey of ground patches: ``dimension`` sensor readings and wet/dry labels.

    The story: each agent is a ground robot that probes patches of soil; a probe returns
    calibrated readings (soil conductivity, surface cooling, ...) and the ground truth says
    whether the patch is wet (+1) or dry (-1). One hidden response vector, drawn from
    ``seed`` alone, links readings to wetness for every agent; each agent surveys its own
    terrain, so its readings have their own offset and spread (heterogeneous local data).
    Labels are drawn from the logistic model, so wet and dry overlap and the
    regularized problem is well posed.

    Returns ``(features, labels)`` of shapes (samples, dimension) and (samples,), labels in
    {-1, +1}; the same arguments always give the same arrays.
    """
    if samples < 1 or dimension < 1:
        raise ObjectiveError(
            f"agent {agent}: logistic data need samples >= 1 and dimension >= 1;"
            f" got samples={samples}, dimension={dimension}"
        )
    truth = agent_generator(seed, 0, _LOGISTIC_TRUTH).normal(size=dimension)
    truth *= 2.0 / max(float(np.linalg.norm(truth)), 1e-12)
    rng = agent_generator(seed, agent, _LOGISTIC_SURVEY)
    offset = rng.normal(scale=0.5, size=dimension)
    spread = rng.uniform(0.5, 1.5, size=dimension)
    features = offset + spread * rng.normal(size=(samples, dimension))
    wet = rng.uniform(size=samples) < _sigmoid(features @ truth)
    return features, np.where(wet, 1.0, -1.0)


def huber_data(
    seed: int, agent: int, samples: int, dimension: int, outliers: float = 0.1
) -> tuple[np.ndarray, np.ndarray]:
    """One agent's range-calibration log: ``dimension`` readings and a measured distance.

    The story: each agent is a beacon fitting a linear calibration from its raw readings to
    the distance a survey tape measured; a fraction ``outliers`` of the logged distances are
    multipath echoes, off by several metres. One hidden calibration, drawn from ``seed``,
    holds for every agent; each agent's readings have their own offset and spread.

    Returns ``(features, responses)`` of shapes (samples, dimension) and (samples,);
    deterministic in its arguments.
    """
    if samples < 1 or dimension < 1:
        raise ObjectiveError(
            f"agent {agent}: Huber data need samples >= 1 and dimension >= 1;"
            f" got samples={samples}, dimension={dimension}"
        )
    truth = agent_generator(seed, 0, _HUBER_TRUTH).normal(size=dimension)
    rng = agent_generator(seed, agent, _HUBER_SURVEY)
    offset = rng.normal(scale=0.5, size=dimension)
    spread = rng.uniform(0.5, 1.5, size=dimension)
    features = offset + spread * rng.normal(size=(samples, dimension))
    responses = features @ truth + rng.normal(scale=0.1, size=samples)
    echo = rng.uniform(size=samples) < outliers
    responses = responses + echo * rng.uniform(3.0, 8.0, size=samples)
    return features, responses


@register_objective("logistic")
@dataclass(frozen=True, slots=True, eq=False)
class Logistic(Objective):
    """f(x) = (1/m) sum_k log(1 + exp(-y_k a_k^T x)) + (reg/2) ||x||^2, labels y_k in {-1, +1}.

    Convex; strongly convex with modulus ``reg`` when reg > 0.
    """

    features: np.ndarray
    labels: np.ndarray
    reg: float = 1e-2
    agent: int | None = None

    @property
    def dimension(self) -> int:  # type: ignore[override]
        return int(self.features.shape[1])

    def _margins(self, x: np.ndarray) -> np.ndarray:
        return self.labels * (self.features @ x)

    def value(self, x: np.ndarray) -> float:
        loss = float(np.mean(np.logaddexp(0.0, -self._margins(x))))
        return loss + 0.5 * self.reg * float(x @ x)

    def grad(self, x: np.ndarray) -> np.ndarray:
        # d/dm log(1 + e^-m) = -sigmoid(-m)
        coef = -self.labels * _sigmoid(-self._margins(x))
        return self.features.T @ coef / self.features.shape[0] + self.reg * x

    def value_and_grad(self, x: np.ndarray) -> tuple[float, np.ndarray]:
        m = self._margins(x)
        value = float(np.mean(np.logaddexp(0.0, -m))) + 0.5 * self.reg * float(x @ x)
        coef = -self.labels * _sigmoid(-m)
        return value, self.features.T @ coef / self.features.shape[0] + self.reg * x

    def smoothness(self) -> float:
        """lambda_max(A^T A) / (4 m) + reg: the logistic loss has curvature at most 1/4."""
        a = self.features
        return float(np.linalg.norm(a, 2) ** 2 / (4.0 * a.shape[0]) + self.reg)

    def spec(self) -> dict[str, Any]:
        out: dict[str, Any] = {
            "kind": "logistic",
            "features": self.features.tolist(),
            "labels": self.labels.tolist(),
            "reg": self.reg,
        }
        if self.agent is not None:
            out["agent"] = self.agent
        return out

    @classmethod
    def from_spec(cls, spec: Mapping[str, Any]) -> Logistic:
        """From ``features`` + ``labels``, or from ``seed``, ``samples``, ``dimension``, ``agent``
        (then :func:`logistic_data` draws them); ``reg`` defaults to 0.01."""
        features, labels = _local_data(spec, "logistic", logistic_data)
        if not np.all(np.isin(labels, (-1.0, 1.0))):
            raise ObjectiveError(
                f"{_owner(_agent_of(spec))}: logistic objective labels must be -1 or +1;"
                f" got values {sorted(set(labels.tolist()))[:5]}"
            )
        reg = _nonnegative(spec, "reg", 1e-2, "logistic")
        return cls(features=features, labels=labels, reg=reg, agent=_agent_of(spec))


@register_objective("huber")
@dataclass(frozen=True, slots=True, eq=False)
class Huber(Objective):
    """f(x) = (1/m) sum_k h(a_k^T x - b_k) + (reg/2) ||x||^2 with the Huber function

    h(r) = r^2 / 2 for |r| <= delta, delta (|r| - delta / 2) otherwise (Huber, Ann. Math.
    Statist. 35 (1964)). Convex with a Lipschitz gradient; strongly convex when reg > 0.
    """

    features: np.ndarray
    responses: np.ndarray
    delta: float = 1.0
    reg: float = 1e-3
    agent: int | None = None

    @property
    def dimension(self) -> int:  # type: ignore[override]
        return int(self.features.shape[1])

    def value(self, x: np.ndarray) -> float:
        r = np.abs(self.features @ x - self.responses)
        d = self.delta
        h = np.where(r <= d, 0.5 * r * r, d * (r - 0.5 * d))
        return float(np.mean(h)) + 0.5 * self.reg * float(x @ x)

    def grad(self, x: np.ndarray) -> np.ndarray:
        r = np.clip(self.features @ x - self.responses, -self.delta, self.delta)
        return self.features.T @ r / self.features.shape[0] + self.reg * x

    def smoothness(self) -> float:
        """lambda_max(A^T A) / m + reg: the Huber function has curvature at most 1."""
        a = self.features
        return float(np.linalg.norm(a, 2) ** 2 / a.shape[0] + self.reg)

    def spec(self) -> dict[str, Any]:
        out: dict[str, Any] = {
            "kind": "huber",
            "features": self.features.tolist(),
            "responses": self.responses.tolist(),
            "delta": self.delta,
            "reg": self.reg,
        }
        if self.agent is not None:
            out["agent"] = self.agent
        return out

    @classmethod
    def from_spec(cls, spec: Mapping[str, Any]) -> Huber:
        """From ``features`` + ``responses``, or from ``seed``, ``samples``, ``dimension``,
        ``agent`` (then :func:`huber_data` draws them); ``delta`` defaults to 1, ``reg`` to 1e-3."""
        features, responses = _local_data(spec, "huber", huber_data)
        delta = _nonnegative(spec, "delta", 1.0, "huber")
        if delta == 0.0:
            raise ObjectiveError(
                f"{_owner(_agent_of(spec))}: huber objective 'delta' = 0; expected delta > 0"
            )
        reg = _nonnegative(spec, "reg", 1e-3, "huber")
        return cls(
            features=features, responses=responses, delta=delta, reg=reg, agent=_agent_of(spec)
        )


def _import_function(path: str, agent: int | None) -> Callable[[np.ndarray], Any]:
    module_name, sep, attr = path.partition(":")
    if not sep or not module_name or not attr:
        raise ObjectiveError(
            f"{_owner(agent)}: custom objective function {path!r} is malformed;"
            " expected 'package.module:function'"
        )
    try:
        target: Any = importlib.import_module(module_name)
        for part in attr.split("."):
            target = getattr(target, part)
    except (ImportError, AttributeError) as exc:
        raise ObjectiveError(
            f"{_owner(agent)}: custom objective function {path!r} cannot be imported:"
            f" {type(exc).__name__}: {exc}"
        ) from exc
    if not callable(target):
        raise ObjectiveError(
            f"{_owner(agent)}: custom objective {path!r} is a {type(target).__name__},"
            " not a callable"
        )
    return target


@register_objective("custom")
@dataclass(frozen=True, slots=True, eq=False)
class Custom(Objective):
    """A user function ``f(x) -> (value, gradient)`` imported from ``"package.module:function"``.

    Every call is checked: if the function raises, returns something other than a pair, a
    gradient of the wrong shape (``dimension`` when given, else the shape of x), or a
    non-finite value or gradient, :class:`ObjectiveError` names the agent and the function.
    """

    function: str
    agent: int | None = None
    #: length of x, if the spec gives it (then the gradient's shape is checked against it)
    dimension: int | None = None  # type: ignore[assignment]
    _fn: Callable[[np.ndarray], Any] = field(init=False, repr=False, compare=False)

    def __post_init__(self) -> None:
        object.__setattr__(self, "_fn", _import_function(self.function, self.agent))

    def _fail(self, what: str) -> ObjectiveError:
        return ObjectiveError(f"{_owner(self.agent)}: custom objective {self.function!r} {what}")

    def value_and_grad(self, x: np.ndarray) -> tuple[float, np.ndarray]:
        x = np.array(x, dtype=float)  # a copy: the user function may not modify our state
        try:
            out = self._fn(x)
        except Exception as exc:
            raise self._fail(f"raised {type(exc).__name__}: {exc}") from exc
        if not (isinstance(out, tuple | list) and len(out) == 2):
            raise self._fail(f"returned {type(out).__name__}; expected a pair (value, gradient)")
        raw_value, raw_grad = out
        try:
            value = np.asarray(raw_value, dtype=float)
            grad = np.asarray(raw_grad, dtype=float)
        except (TypeError, ValueError) as exc:
            raise self._fail(f"returned values that are not numbers: {exc}") from exc
        if value.shape != ():
            raise self._fail(f"returned a value of shape {value.shape}; expected a scalar")
        expected = (self.dimension,) if self.dimension is not None else x.shape
        if grad.shape != expected:
            raise self._fail(f"returned a gradient of shape {grad.shape}; expected {expected}")
        if not np.isfinite(value):
            raise self._fail(f"returned a non-finite value {float(value)} at x = {x.tolist()}")
        if not np.all(np.isfinite(grad)):
            raise self._fail(f"returned a non-finite gradient {grad.tolist()} at x = {x.tolist()}")
        return float(value), grad

    def value(self, x: np.ndarray) -> float:
        return self.value_and_grad(x)[0]

    def grad(self, x: np.ndarray) -> np.ndarray:
        return self.value_and_grad(x)[1]

    def spec(self) -> dict[str, Any]:
        out: dict[str, Any] = {"kind": "custom", "function": self.function}
        if self.agent is not None:
            out["agent"] = self.agent
        if self.dimension is not None:
            out["dimension"] = self.dimension
        return out

    @classmethod
    def from_spec(cls, spec: Mapping[str, Any]) -> Custom:
        """From ``function`` (required), ``agent`` and ``dimension`` (optional)."""
        agent = _agent_of(spec)
        function = spec.get("function")
        if not isinstance(function, str):
            raise ObjectiveError(
                f"{_owner(agent)}: custom objective needs 'function' ="
                f" 'package.module:function'; got {function!r}"
            )
        dim = spec.get("dimension")
        return cls(function=function, agent=agent, dimension=None if dim is None else int(dim))


# Array form: one objective per row of a block ------------------------------------------------
class BlockObjective:
    """The local objectives of a block of agents, evaluated for all rows at once.

    Quadratic, logistic and Huber objectives of one shape are stacked and evaluated with
    batched matrix products; any other mix (a custom objective, data of unequal sizes)
    falls back to one call per agent. ``grad`` and ``value`` take X of shape (B, d).
    """

    def __init__(self, objectives: list[Objective], ids: list[int]) -> None:
        self.objectives = objectives
        self.ids = ids
        self.kind = "per-agent"
        kinds = {type(o) for o in objectives}
        if kinds == {Quadratic}:
            self.kind = "quadratic"
            self._t = np.array([o.target for o in objectives], dtype=float)
            self._q = np.array([o.curvature for o in objectives], dtype=float)
            d = self._t.shape[1]
            off = self._q * (1.0 - np.eye(d))
            #: diagonal curvatures (identity by default): an elementwise product gives the
            #: same numbers as the matrix product, whose other terms are exact zeros
            self._diag = (
                np.ascontiguousarray(np.diagonal(self._q, axis1=1, axis2=2))
                if not off.any()
                else None
            )
        elif kinds in ({Logistic}, {Huber}) and len({o.features.shape for o in objectives}) == 1:
            self.kind = "logistic" if kinds == {Logistic} else "huber"
            self._a = np.array([o.features for o in objectives], dtype=float)
            self._at = np.ascontiguousarray(np.swapaxes(self._a, 1, 2))
            self._m = float(self._a.shape[1])
            self._reg = np.array([o.reg for o in objectives], dtype=float)[:, None]
            if self.kind == "logistic":
                self._y = np.array([o.labels for o in objectives], dtype=float)
            else:
                self._y = np.array([o.responses for o in objectives], dtype=float)
                self._delta = np.array([o.delta for o in objectives], dtype=float)[:, None]

    @classmethod
    def of(cls, objectives: list[Objective], ids: list[int]) -> BlockObjective:
        return cls(list(objectives), list(ids))

    def _raised(self, b: int, exc: Exception) -> ObjectiveError:
        if isinstance(exc, ObjectiveError):
            return exc
        return ObjectiveError(
            f"agent {self.ids[b]}: objective {self.objectives[b].kind!r} raised"
            f" {type(exc).__name__}: {exc}"
        )

    def grad(self, x: np.ndarray) -> np.ndarray:
        """(B, d) gradients; a per-agent objective's error names its agent."""
        if self.kind == "quadratic":
            if self._diag is not None:
                return self._diag * (x - self._t)
            return np.matmul(self._q, (x - self._t)[..., None])[..., 0]
        if self.kind == "logistic":
            m = self._y * np.matmul(self._a, x[..., None])[..., 0]
            coef = -self._y * _sigmoid(-m)
            return np.matmul(self._at, coef[..., None])[..., 0] / self._m + self._reg * x
        if self.kind == "huber":
            r = np.matmul(self._a, x[..., None])[..., 0] - self._y
            r = np.clip(r, -self._delta, self._delta)
            return np.matmul(self._at, r[..., None])[..., 0] / self._m + self._reg * x
        out = np.empty_like(x, dtype=float)
        d = x.shape[1]
        for b, o in enumerate(self.objectives):
            try:
                g = np.asarray(o.grad(x[b]), dtype=float)
            except Exception as exc:
                raise self._raised(b, exc) from exc
            if g.shape != (d,):
                raise ObjectiveError(
                    f"agent {self.ids[b]}: objective {o.kind!r} returned a gradient of shape"
                    f" {g.shape}; expected ({d},)"
                )
            out[b] = g
        return out

    def value(self, x: np.ndarray) -> np.ndarray:
        """(B,) local values."""
        if self.kind == "quadratic":
            e = x - self._t
            return 0.5 * np.einsum("bi,bi->b", np.matmul(e[:, None, :], self._q)[:, 0, :], e)
        reg = None if self.kind == "per-agent" else 0.5 * self._reg[:, 0] * (x * x).sum(axis=1)
        if self.kind == "logistic":
            m = self._y * np.matmul(self._a, x[..., None])[..., 0]
            return np.mean(np.logaddexp(0.0, -m), axis=1) + reg
        if self.kind == "huber":
            r = np.abs(np.matmul(self._a, x[..., None])[..., 0] - self._y)
            d = self._delta
            h = np.where(r <= d, 0.5 * r * r, d * (r - 0.5 * d))
            return np.mean(h, axis=1) + reg
        out = np.empty(len(x))
        for b, o in enumerate(self.objectives):
            try:
                out[b] = float(o.value(x[b]))
            except Exception as exc:
                raise self._raised(b, exc) from exc
        return out
