"""The log posterior of a user's model: loading the model, likelihoods, batching.

A model is named ``"module:function"`` and is either

* a forward model ``f(theta, inputs) -> predictions`` (with no inputs: ``f(theta, None)``,
  or ``f(theta)`` when the function takes one argument) compared with observations through a likelihood (Gaussian or Student t, with a
  known noise scale, per-observation scales, or a scale estimated as an extra parameter),
* or a full log density ``g(theta) -> float`` (the prior already included by the user; the
  priors' bounds still restrict the support).

``theta`` is a 1-D array of the model's parameters in the user's units, or, for a
*vectorised* model, a 2-D batch ``(k, d)`` for which ``f`` returns ``(k, n_obs)`` (``g``
returns ``(k,)``). With ``vectorised="auto"`` the model is probed on two parameter rows
(the 40 % and 60 % prior quantiles): it counts as vectorised when the batch call returns the
right shape *and* agrees with two single-row calls.

Non-finite model output
-----------------------
A model returning NaN or an infinite value at a parameter point inside the prior is taken to
be outside its domain there: the log posterior at that point is ``-inf`` (the sampler rejects
the move) and the event is counted in :attr:`LogPosterior.n_nonfinite`. A model that gives
non-finite output at every starting point the sampler tries is reported as an error.
"""

from __future__ import annotations

import importlib
import inspect
import math
import sys
from collections.abc import Callable, Mapping, Sequence
from pathlib import Path
from typing import Any, Literal

import numpy as np
import numpy.typing as npt
from scipy import special

from ._priors import Prior, PriorSet, as_prior_set

__all__ = ["LIKELIHOODS", "LogPosterior", "build_log_posterior", "load_callable"]

Likelihood = Literal["gaussian", "student_t"]
LIKELIHOODS: tuple[str, ...] = ("gaussian", "student_t")
_LOG_SQRT_2PI = 0.5 * math.log(2.0 * math.pi)


# --------------------------------------------------------------------------------------------
# loading
# --------------------------------------------------------------------------------------------
def load_callable(spec: str, *, search_path: Path | str | None = None) -> Callable[..., Any]:
    """Import ``"module:function"`` and return the function.

    Parameters
    ----------
    spec : str
        ``"package.module:function"`` (a dotted attribute path after the colon is allowed).
    search_path : Path, optional
        Folder put first on ``sys.path`` (if not there already) before importing, so that a
        model file in the working folder is found.

    Raises
    ------
    ValueError
        Malformed spec, import failure, missing attribute or not callable; the message names
        the spec.
    """
    if not isinstance(spec, str) or spec.count(":") != 1:
        raise ValueError(f"model {spec!r}: expected 'module:function'")
    mod_name, attr = (s.strip() for s in spec.split(":"))
    if not mod_name or not attr:
        raise ValueError(f"model {spec!r}: expected 'module:function'")
    if search_path is not None:
        folder = str(Path(search_path).resolve())
        if not Path(folder).is_dir():
            raise ValueError(f"model {spec!r}: search path {folder!r} is not a folder")
        if folder not in sys.path:
            sys.path.insert(0, folder)
        importlib.invalidate_caches()
    try:
        module = importlib.import_module(mod_name)
    except ModuleNotFoundError as exc:
        where = f" (searched {search_path} and the installed packages)" if search_path else ""
        raise ValueError(f"model {spec!r}: module {exc.name!r} not found{where}") from None
    except Exception as exc:  # noqa: BLE001 - any error while importing user code
        raise ValueError(
            f"model {spec!r}: importing {mod_name!r} failed: {type(exc).__name__}: {exc}"
        ) from exc
    obj: Any = module
    for part in attr.split("."):
        if not hasattr(obj, part):
            raise ValueError(f"model {spec!r}: module {mod_name!r} has no attribute {attr!r}")
        obj = getattr(obj, part)
    if not callable(obj):
        raise ValueError(f"model {spec!r}: {attr!r} is a {type(obj).__name__}, not a function")
    return obj


def _describe(func: Callable[..., Any]) -> str:
    mod = getattr(func, "__module__", None) or "?"
    name = getattr(func, "__qualname__", None) or type(func).__name__
    return f"{mod}:{name}"


def _accepts(func: Callable[..., Any], n_args: int) -> bool:
    try:
        inspect.signature(func).bind(*([None] * n_args))
    except TypeError:
        return False
    except ValueError:
        return True  # no signature to inspect (some builtins): assume it fits
    return True


def _check_signature(func: Callable[..., Any], n_args: int, label: str) -> None:
    try:
        sig = inspect.signature(func)
    except (TypeError, ValueError):
        return  # builtins without a signature: let the call decide
    try:
        sig.bind(*([None] * n_args))
    except TypeError:
        want = "f(theta, inputs)" if n_args == 2 else "f(theta)"
        raise TypeError(f"model {label}: signature {sig} cannot be called as {want}") from None


# --------------------------------------------------------------------------------------------
# the log posterior
# --------------------------------------------------------------------------------------------
class LogPosterior:
    """Unnormalised log posterior in the user's units, callable on batches of rows.

    Call with ``x`` of shape (k, d) (or (d,)) to get shape (k,). Rows outside the priors'
    support, or where the model gives non-finite output, get ``-inf``.

    Attributes
    ----------
    priors : PriorSet
        Priors of every parameter, including an estimated noise scale.
    names, units : tuple of str
    model : str
        ``"module:function"`` of the user's model (for messages).
    vectorised : bool
    n_evals : int
        Parameter rows the model was evaluated on.
    n_nonfinite : int
        Of those, rows where the model output was NaN or infinite.
    """

    def __init__(
        self,
        priors: PriorSet,
        evaluate: Callable[[np.ndarray], np.ndarray],
        *,
        model: str,
        vectorised: bool,
    ) -> None:
        self.priors = priors
        self.names = priors.names
        self.units = priors.units
        self.model = model
        self.vectorised = vectorised
        self._evaluate = evaluate
        self.n_evals = 0
        self.n_nonfinite = 0

    @property
    def d(self) -> int:
        return self.priors.d

    def __call__(self, x: npt.ArrayLike) -> np.ndarray:
        if not (type(x) is np.ndarray and x.ndim == 2 and x.dtype == np.float64):
            x = np.atleast_2d(np.asarray(x, dtype=np.float64))  # the sampler's rows skip this
        if x.ndim != 2 or x.shape[1] != self.d:
            raise ValueError(f"parameter rows must have shape (k, {self.d}), got {x.shape}")
        with np.errstate(all="ignore"):  # non-finite model output: see the module notes
            return self._add_model(x, self.priors.logpdf(x))

    def at_unconstrained(self, u: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """The samplers' entry: rows ``u`` (k, d) of the unconstrained space (float64).

        Returns ``(log posterior + log-Jacobian, log posterior, x)`` at ``x = to_user(u)``,
        shapes (k,), (k,), (k, d), with the prior's map, density and Jacobian computed in
        one pass (:meth:`PriorSet.transform_rows`). Call it under
        ``np.errstate(all="ignore")``, as :func:`~winnow.tasks.sample.sample` does once
        for its whole run (entering it at every call costs as much as the rest of the
        likelihood for a small model).
        """
        rows = self.rows_at_unconstrained(u)
        d = self.d
        return rows[:, 2 * d], rows[:, 2 * d + 1], rows[:, d : 2 * d]

    def rows_at_unconstrained(self, u: np.ndarray) -> np.ndarray:
        """:meth:`at_unconstrained` laid out as the samplers keep their chains: shape
        (k, 2 d + 2), rows ``[u | x | log posterior + log-Jacobian | log posterior]``."""
        rows = self.priors.transform_rows(u)
        d = self.d
        x = rows[:, d : 2 * d]
        if self.vectorised:  # a batch model gets a contiguous array, as from the user
            x = np.ascontiguousarray(x)
        lp = self._add_model(x, rows[:, 2 * d + 1])  # in place: the log prior's column
        rows[:, 2 * d] += lp  # the log-Jacobian's column
        return rows

    def _add_model(self, x: np.ndarray, out: np.ndarray) -> np.ndarray:
        """Add the model's term to the log prior ``out`` (k,) of rows ``x``, in place."""
        # A finite sum means every term is finite (one reduction instead of a mask and a
        # test; an overflowing sum only sends us down the exact path).
        all_inside = math.isfinite(np.add.reduce(out))
        inside = None if all_inside else np.flatnonzero(np.isfinite(out))
        if all_inside or inside.size:  # type: ignore[union-attr]
            ll = self._evaluate(x if all_inside else x[inside])
            self.n_evals += len(ll)
            if not math.isfinite(np.add.reduce(ll)):  # outside the model's domain: see notes
                nonfinite = ~np.isfinite(ll)
                self.n_nonfinite += int(np.count_nonzero(nonfinite))
                ll = np.where(nonfinite, -np.inf, ll)
            if all_inside:
                out += ll
            else:
                out[inside] += ll
        return out


def _validate_observations(observations: npt.ArrayLike | None) -> np.ndarray:
    if observations is None:
        raise ValueError("observations: a forward model needs observations")
    try:
        y = np.asarray(observations, dtype=np.float64)
    except (TypeError, ValueError):
        raise ValueError("observations: values must be numbers") from None
    y = np.atleast_1d(y)
    if y.ndim != 1 or y.size == 0:
        raise ValueError(f"observations: expected a 1-D array of values, got shape {y.shape}")
    missing = np.flatnonzero(~np.isfinite(y))
    if missing.size:
        raise ValueError(
            f"observations: {missing.size} missing or non-finite value(s) at position(s) "
            f"{missing[:10].tolist()}{' ...' if missing.size > 10 else ''}; remove those rows"
        )
    return y


def _noise(
    sigma: Any, n_obs: int, priors: list[Prior]
) -> tuple[np.ndarray | None, int | None, list[Prior]]:
    """Return (fixed sigma (n_obs,) or None, index of the noise parameter or None, priors)."""
    if sigma is None:
        raise ValueError("sigma: a forward model needs a noise scale (value, array or estimate)")
    if isinstance(sigma, Mapping):
        if set(sigma) != {"estimate"}:
            raise ValueError(
                f"sigma: a dict must be {{'estimate': prior}}, got keys {sorted(sigma)}"
            )
        spec = sigma["estimate"]
        if isinstance(spec, Prior):
            prior = spec
        elif isinstance(spec, Mapping):
            spec = {k: v for k, v in spec.items() if v is not None}
            spec.setdefault("name", "sigma")
            prior = Prior.from_dict(spec, where="sigma.estimate")
        else:
            raise TypeError(f"sigma.estimate must be a prior dict, got {type(spec).__name__}")
        names = [p.name for p in priors]
        if prior.name in names:
            raise ValueError(
                f"sigma.estimate: a parameter named {prior.name!r} exists already; give the "
                "noise prior another 'name'"
            )
        return None, len(priors), [*priors, prior]
    if isinstance(sigma, str):
        names = [p.name for p in priors]
        if sigma not in names:
            raise ValueError(
                f"sigma: {sigma!r} names no parameter (parameters: {', '.join(names)})"
            )
        return None, names.index(sigma), priors
    try:
        s = np.asarray(sigma, dtype=np.float64)
    except (TypeError, ValueError):
        raise TypeError("sigma: expected a number, an array or {'estimate': prior}") from None
    if s.ndim == 0:
        s = np.full(n_obs, float(s))
    if s.shape != (n_obs,):
        raise ValueError(f"sigma: expected a scalar or {n_obs} values, got shape {s.shape}")
    bad = np.flatnonzero(~(np.isfinite(s) & (s > 0)))
    if bad.size:
        raise ValueError(
            f"sigma: values must be finite and > 0; position(s) {bad[:10].tolist()} are not"
        )
    return s, None, priors


def _gaussian(r: np.ndarray, s: np.ndarray) -> np.ndarray:
    z = r / s
    return np.sum(-0.5 * z * z - np.log(s) - _LOG_SQRT_2PI, axis=-1)


def _gaussian_fixed(s: np.ndarray) -> Callable[[np.ndarray, np.ndarray], np.ndarray]:
    """Gaussian log likelihood of predictions ``pred`` (k, n_obs) of observations ``y`` for
    a known scale ``s``: the normalising constant and ``1 / (2 s^2)`` are computed once,
    not at every evaluation."""
    half_prec = 0.5 / (s * s)
    const = float(-np.log(s).sum() - s.size * _LOG_SQRT_2PI)

    def loglik(pred: np.ndarray, y: np.ndarray) -> np.ndarray:
        r = pred - y  # not in place: a vectorised model's output may be its own array
        r *= r
        ll = np.dot(r, half_prec)  # sum of r^2 / (2 s^2); np.dot: less overhead than @
        return np.subtract(const, ll, out=ll)

    return loglik


def _student_t(nu: float) -> Callable[[np.ndarray, np.ndarray], np.ndarray]:
    const = (
        special.gammaln(0.5 * (nu + 1)) - special.gammaln(0.5 * nu) - 0.5 * math.log(nu * math.pi)
    )

    def loglik(r: np.ndarray, s: np.ndarray) -> np.ndarray:
        z = r / s
        return np.sum(const - np.log(s) - 0.5 * (nu + 1) * np.log1p(z * z / nu), axis=-1)

    return loglik


def _shares_buffer(vals: Sequence[Any]) -> bool:
    """True when two of a model's results may be one mutable object or views of one
    buffer."""
    # One set of ids: an array counts by the buffer it views (its base), anything else by
    # itself. A float constant returned for several rows also counts: harmless, the
    # results are then only copied as they come.
    owners = {id(v if (b := getattr(v, "base", None)) is None else b) for v in vals}
    return len(owners) < len(vals)


def _probe_rows(priors: PriorSet, cols: Sequence[int]) -> np.ndarray:
    q = np.array([[0.4] * priors.d, [0.6] * priors.d])
    return priors.ppf(q)[:, list(cols)]


def _make_caller(
    func: Callable[..., Any],
    label: str,
    inputs: Any,
    out_shape: tuple[int, ...],
    vectorised: bool | str,
    probe: np.ndarray,
) -> tuple[Callable[[np.ndarray], np.ndarray], bool]:
    """Return (rows (k, p) -> outputs (k, *out_shape), vectorised?)."""
    # f(theta, inputs); with no inputs, f(theta, None) or f(theta), whichever fits.
    args: tuple[Any, ...] = (inputs,)
    if inputs is None and not _accepts(func, 2) and _accepts(func, 1):
        args = ()
    _check_signature(func, 1 + len(args), label)
    kind = "predictions" if out_shape else "log density"

    def single(theta: np.ndarray) -> np.ndarray:
        try:
            out = np.asarray(func(theta, *args), dtype=np.float64)
        except Exception as exc:  # noqa: BLE001 - report any failure of user code with theta
            raise ValueError(
                f"model {label} failed at theta={theta.tolist()}: {type(exc).__name__}: {exc}"
            ) from exc
        if out.shape != out_shape and not (out_shape == () and out.shape == (1,)):
            raise ValueError(
                f"model {label} returned {kind} of shape {out.shape} at theta="
                f"{theta.tolist()}; expected {out_shape or 'a scalar'}"
            )
        return out.reshape(out_shape)

    # loop() and batch() run under np.errstate(all="ignore"), set once by LogPosterior's
    # caller (non-finite output is handled by LogPosterior).
    def copying_loop(rows: Sequence[np.ndarray], vals: Sequence[Any] | None) -> np.ndarray:
        """Check and copy each result (``vals``, or the model's output as it comes)."""
        out = np.empty((len(rows), *out_shape))
        for k, theta in enumerate(rows):
            try:
                val = np.asarray(func(theta, *args) if vals is None else vals[k], np.float64)
            except Exception:  # noqa: BLE001 - single() reports it with theta
                val = single(theta)
            if val.shape != out_shape:
                val = single(theta)
            out[k] = val
        return out

    shared = [False]  # once a model's results shared a buffer: copy them as they come

    def loop(x: np.ndarray) -> np.ndarray:
        rows = list(x)
        if shared[0]:
            return copying_loop(rows, None)
        # Between two calls of a slow model numpy's code has left the CPU caches: do
        # nothing per row but call the model, and check and convert all results at once.
        vals: list[Any] = []
        append = vals.append
        while len(vals) < len(rows):
            try:
                for theta in rows[len(vals) :]:
                    append(func(theta, *args))
            except Exception:  # noqa: BLE001 - single() reports it with theta
                append(single(rows[len(vals)]))
        if _shares_buffer(vals):
            # e.g. a model that returns one output array it overwrites at every call:
            # the earlier results may be gone; evaluate again, copying each result.
            shared[0] = True
            return copying_loop(rows, None)
        try:
            out = np.array(vals, dtype=np.float64)
        except (TypeError, ValueError):
            out = None
        if out is None or out.shape != (len(rows), *out_shape):
            return copying_loop(rows, vals)  # reports a bad result with its theta
        return out

    def batch(x: np.ndarray) -> np.ndarray:
        try:
            out = np.asarray(func(x, *args), dtype=np.float64)
        except Exception as exc:  # noqa: BLE001 - report any failure of user code
            raise ValueError(
                f"vectorised model {label} failed on a batch of {len(x)} rows: "
                f"{type(exc).__name__}: {exc}"
            ) from exc
        if out.shape != (len(x), *out_shape):
            raise ValueError(
                f"vectorised model {label} returned shape {out.shape} for a batch of "
                f"{len(x)} rows; expected {(len(x), *out_shape)}"
            )
        return out

    return _choose_caller(func, args, out_shape, vectorised, probe, loop, batch)


def _choose_caller(
    func: Callable[..., Any],
    args: tuple[Any, ...],
    out_shape: tuple[int, ...],
    vectorised: bool | str,
    probe: np.ndarray,
    loop: Callable[[np.ndarray], np.ndarray],
    batch: Callable[[np.ndarray], np.ndarray],
) -> tuple[Callable[[np.ndarray], np.ndarray], bool]:
    """The row-by-row ``loop`` or the ``batch`` caller, as ``vectorised`` says or (auto) as
    the probe rows show: a batch call must give the right shape and agree with single-row
    calls."""
    choice = {"yes": True, "no": False, True: True, False: False, "auto": "auto"}
    if vectorised not in choice:
        raise ValueError(f"vectorised must be 'auto', 'yes' or 'no', got {vectorised!r}")
    mode = choice[vectorised]
    if mode is True:
        with np.errstate(all="ignore"):
            batch(probe)
        return batch, True
    if mode is False:
        with np.errstate(all="ignore"):
            loop(probe)
        return loop, False
    try:
        with np.errstate(all="ignore"):
            singles: np.ndarray | None = loop(probe)
        single_error: Exception | None = None
    except ValueError as exc:
        singles, single_error = None, exc
    try:
        with np.errstate(all="ignore"):
            batched = np.asarray(func(probe, *args), dtype=np.float64)
    except Exception:  # noqa: BLE001 - a non-vectorised model may fail any way on a batch
        batched = None
    if batched is not None and batched.shape == (len(probe), *out_shape):
        if singles is None or np.allclose(batched, singles, rtol=1e-9, atol=0.0, equal_nan=True):
            return batch, True
    if singles is None:
        assert single_error is not None
        raise single_error
    return loop, False


def build_log_posterior(
    priors: PriorSet | Sequence[Prior | Mapping[str, Any]],
    *,
    forward: Callable[..., Any] | None = None,
    inputs: Any = None,
    observations: npt.ArrayLike | None = None,
    sigma: Any = None,
    likelihood: Likelihood = "gaussian",
    nu: float = 4.0,
    log_density: Callable[..., Any] | None = None,
    vectorised: Literal["auto", "yes", "no"] | bool = "auto",
    param_names: Sequence[str] | None = None,
) -> LogPosterior:
    """Build the log posterior of a forward model with a likelihood, or of a log density.

    Parameters
    ----------
    priors : sequence of Prior or dict
        One per parameter (see :class:`~winnow.tasks.sample.Prior`), in the order of
        ``theta``.
    forward : callable, optional
        ``f(theta, inputs) -> predictions`` of shape (n_obs,) (with ``inputs`` None a
        one-argument ``f(theta)`` is accepted too); vectorised: ``(k, p) -> (k, n_obs)``.
    inputs : any, optional
        Passed unchanged as the second argument of ``forward`` (e.g. a dict of arrays).
    observations : array_like, shape (n_obs,)
        Measured values; missing values are an error.
    sigma : float, array_like of shape (n_obs,), str or dict
        Noise scale: a known value, one value per observation, the name of a parameter in
        ``priors`` that is the noise scale, or ``{"estimate": prior}`` to add a parameter
        (named ``"sigma"`` unless the prior dict names it) estimated with that prior. An
        estimated scale is not passed to the forward model.
    likelihood : {"gaussian", "student_t"}
        Independent errors; ``student_t`` with ``nu`` degrees of freedom and scale ``sigma``
        is robust to outliers.
    nu : float
        Degrees of freedom of the Student t likelihood.
    log_density : callable, optional
        Instead of ``forward``: ``g(theta) -> log posterior`` with the prior included.
    vectorised : {"auto", "yes", "no"}
        Whether the model takes a batch of rows (see the module notes).
    param_names : sequence of str, optional
        The parameters passed to the model, in order (default: all but the noise scale).

    Returns
    -------
    LogPosterior

    Raises
    ------
    ValueError, TypeError
        Bad priors, observations, noise or likelihood; a model with the wrong signature or
        output shape. Messages name the argument or the model.
    """
    prior_list = list(as_prior_set(priors).priors)
    if (forward is None) == (log_density is None):
        raise ValueError("give exactly one of 'forward' or 'log_density'")
    func = forward if forward is not None else log_density
    if not callable(func):
        raise TypeError(f"the model must be callable, got {type(func).__name__}")
    label = _describe(func)

    if log_density is not None:
        return _density_posterior(PriorSet(prior_list), log_density, label, vectorised, param_names)

    y = _validate_observations(observations)
    fixed_sigma, noise_col, prior_list = _noise(sigma, y.size, prior_list)
    ps = PriorSet(prior_list)
    if likelihood not in LIKELIHOODS:
        raise ValueError(f"likelihood must be one of {', '.join(LIKELIHOODS)}, got {likelihood!r}")
    if not (isinstance(nu, (int, float)) and math.isfinite(nu) and nu > 0):
        raise ValueError(f"nu must be a positive number, got {nu!r}")
    if noise_col is not None and not (ps.low[noise_col] >= 0):
        raise ValueError(
            f"the noise scale {ps.names[noise_col]!r} must have a prior on positive values "
            f"(low >= 0), got support [{ps.low[noise_col]}, {ps.high[noise_col]}]"
        )
    loglik = _gaussian if likelihood == "gaussian" else _student_t(float(nu))
    cols = _model_columns(ps, param_names, exclude=noise_col)
    caller, vec = _make_caller(forward, label, inputs, y.shape, vectorised, _probe_rows(ps, cols))

    identity = cols == list(range(ps.d))
    if fixed_sigma is not None and likelihood == "gaussian":
        fixed_loglik = _gaussian_fixed(fixed_sigma)

        def evaluate_fixed(x: np.ndarray) -> np.ndarray:
            return fixed_loglik(caller(x if identity else x[:, cols]), y)

        return LogPosterior(ps, evaluate_fixed, model=label, vectorised=vec)

    def evaluate_forward(x: np.ndarray) -> np.ndarray:
        s = fixed_sigma[None, :] if fixed_sigma is not None else x[:, [noise_col]]
        return loglik(caller(x if identity else x[:, cols]) - y, s)

    return LogPosterior(ps, evaluate_forward, model=label, vectorised=vec)


def _density_posterior(
    ps: PriorSet,
    log_density: Callable[..., Any],
    label: str,
    vectorised: bool | str,
    param_names: Sequence[str] | None,
) -> LogPosterior:
    """The log posterior of a user's full log density (prior included)."""
    cols = _model_columns(ps, param_names, exclude=None)
    caller, vec = _make_caller(log_density, label, None, (), vectorised, _probe_rows(ps, cols))

    def evaluate_density(x: np.ndarray) -> np.ndarray:
        # The user's density includes the prior: subtract ours so it is not counted twice.
        return caller(x[:, cols]) - ps.logpdf(x)

    return LogPosterior(ps, evaluate_density, model=label, vectorised=vec)


def _model_columns(
    ps: PriorSet, param_names: Sequence[str] | None, *, exclude: int | None
) -> list[int]:
    if param_names is None:
        return [j for j in range(ps.d) if j != exclude]
    if isinstance(param_names, str):
        raise TypeError("param_names must be a sequence of names, not one string")
    cols = []
    for name in param_names:
        if name not in ps.names:
            raise ValueError(
                f"param_names: {name!r} is not a parameter (parameters: {', '.join(ps.names)})"
            )
        cols.append(ps.names.index(name))
    return cols
