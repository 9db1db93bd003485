"""Hostile and careless input, property-based: every bad argument gets a ValueError or TypeError whose
message names the argument, nothing hangs (sizes are small), and no failed call touches an existing
checkpoint. Which values are valid is the documented contract of each argument (docstrings of
``st.sample``, ``st.Target``, ``st.Latent`` and the kernels); the error style (exception class by kind,
argument named) is common practice (torch.optim, scikit-learn ``check_scalar``).
"""

import functools
import math
import os

import pytest
import torch
from hypothesis import HealthCheck, assume, given, settings
from hypothesis import strategies as hst
from torch.distributions import constraints

import stein_torch as st

FAST = dict(particles=4, steps=1, precondition=None, seed=0, progress=False)
CHECK = settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.too_slow])
BAD_NUMBERS = hst.one_of(
    hst.floats(allow_nan=True, allow_infinity=True), hst.none(), hst.text(max_size=3), hst.booleans(),
    hst.just(2.0), hst.just([3]), hst.just(torch.tensor(3)),
)


def gaussian(x):
    return -0.5 * (x**2).sum(-1)


TARGET = st.Target(gaussian, dim=2)


@pytest.fixture(scope="module")
def good_checkpoint(tmp_path_factory):
    path = tmp_path_factory.mktemp("hostile") / "good.pt"
    st.svgd(TARGET, checkpoint=path, **FAST)
    return path


def rejected(name, checkpoint, target=TARGET, **kwargs):
    """Call st.sample with one bad argument; the error must name it and the checkpoint stay intact."""
    before = checkpoint.read_bytes()
    with pytest.raises((ValueError, TypeError)) as info:
        st.svgd(target, **{**FAST, "checkpoint": checkpoint, **kwargs})
    assert name in str(info.value), str(info.value)
    assert checkpoint.read_bytes() == before
    assert sorted(os.listdir(checkpoint.parent)) == ["good.pt"]  # no stray temporary file either
    return info.value


# ---------------------------------------------------------------------- counts, seed, dtype, device
@CHECK
@given(arg=hst.sampled_from(["particles", "steps", "ensembles", "checkpoint_every"]),
       value=hst.one_of(hst.integers(max_value=0), BAD_NUMBERS))
def test_counts_must_be_positive_ints(good_checkpoint, arg, value):
    assume(not (arg == "steps" and isinstance(value, int) and not isinstance(value, bool) and value == 0))
    assume(not (arg == "checkpoint_every" and value is None))  # None is the documented default
    rejected(arg, good_checkpoint, **{arg: value})


@CHECK
@given(value=hst.one_of(hst.integers(max_value=-1), hst.integers(min_value=2**64), BAD_NUMBERS.filter(
    lambda v: v is not None)))
def test_seed_must_be_an_int_in_range(good_checkpoint, value):
    rejected("seed", good_checkpoint, seed=value)


@CHECK
@given(value=hst.sampled_from([torch.float16, torch.bfloat16, torch.int64, torch.int32, torch.bool,
                               torch.complex64, torch.complex128, "float64", 64, None, float]))
def test_dtype_must_be_float32_or_float64(good_checkpoint, value):
    rejected("dtype", good_checkpoint, dtype=value)


@CHECK
@given(value=hst.sampled_from(["meta", "cuda", "cuda:3", "nonsense", "cpu:x", -1, 7, 2.5, True, object()]))
def test_device_must_exist(good_checkpoint, value):
    if torch.cuda.is_available() and str(value).startswith("cuda"):
        pytest.skip("CUDA is present here")
    rejected("device", good_checkpoint, device=value)


@CHECK
@given(value=hst.one_of(hst.text(max_size=8), hst.just(["auto"]), hst.integers(), hst.just(True)))
def test_precondition_is_one_of_three(good_checkpoint, value):
    assume(value not in ("auto", "laplace"))
    rejected("precondition", good_checkpoint, precondition=value)


# ---------------------------------------------------------------------- init
INIT_DTYPES = [torch.int64, torch.int32, torch.float16, torch.float32, torch.float64, torch.complex64, torch.bool]


@CHECK
@given(shape=hst.one_of(hst.sampled_from([[4, 2], [1, 4, 2]]), hst.lists(hst.integers(0, 5), max_size=3)), dtype=hst.sampled_from(INIT_DTYPES),
       fill=hst.one_of(hst.floats(allow_nan=True, allow_infinity=True), hst.sampled_from([1e308, -1e308, 5e-324, 0.0])))
def test_init_tensors_of_any_shape_dtype_and_value(good_checkpoint, shape, dtype, fill):
    if dtype.is_floating_point or dtype.is_complex:
        values = torch.full(shape, fill, dtype=torch.float64).to(dtype)
    else:
        values = torch.zeros(shape, dtype=dtype)
    real = dtype not in (torch.complex64, torch.bool)
    finite = values.numel() > 0 and real and bool(torch.isfinite(values.double()).all())
    size = float(values.double().abs().max()) if finite else math.inf
    if tuple(shape) not in ((4, 2), (1, 4, 2)) or not finite:
        rejected("init", good_checkpoint, init=values)
    elif size < 1e6:  # a usable start: the run goes through and stays finite
        run = st.svgd(TARGET, init=values, **FAST)
        assert torch.isfinite(run.draws["x"]).all()
    else:  # huge but finite: either refused (log density overflows) or run with finite draws
        try:
            run = st.svgd(TARGET, init=values, **FAST)
        except (ValueError, TypeError) as err:
            assert "init" in str(err)
        else:
            assert torch.isfinite(run.draws["x"]).all()


@CHECK
@given(value=hst.one_of(hst.text(max_size=6), hst.just([[0.0, 0.0]] * 4), hst.integers(), hst.just({"y": torch.zeros(4, 2)}),
                        hst.just({"x": "abc"}), hst.just({"x": torch.zeros(4, 2, device="meta")})))
def test_init_of_the_wrong_kind(good_checkpoint, value):
    assume(value not in ("prior", "laplace"))
    rejected("init", good_checkpoint, init=value)


def test_init_for_named_parameters_outside_the_support(good_checkpoint):
    target = st.Target(lambda p: -p["tau"] - 0.5 * p["mu"] ** 2,
                       latents={"mu": st.Latent(), "tau": st.Latent(support=constraints.positive)})
    err = rejected("init", good_checkpoint, target=target,
                   init={"mu": torch.zeros(4), "tau": torch.tensor([1.0, -1.0, 2.0, 0.0])})
    assert "2 of 4 values lie outside the support" in str(err)


# ---------------------------------------------------------------------- stepper and kernel objects
BAD_STEPPERS = [3, "adam", lambda params: 3, functools.partial(torch.optim.Adam, lr=-1.0),
                functools.partial(torch.optim.SGD, lr=float("nan")), functools.partial(torch.optim.Adam, betas=(2.0, 0.9)),
                torch.optim.Adam([torch.zeros(1, requires_grad=True)])]


@pytest.mark.parametrize("value", BAD_STEPPERS, ids=range(len(BAD_STEPPERS)))
def test_bad_steppers(good_checkpoint, value):
    rejected("stepper", good_checkpoint, stepper=value)


@pytest.mark.parametrize("value", [st.kernels.RBF, "rbf", 3, torch.eye(2)], ids=["class", "str", "int", "tensor"])
def test_bad_kernel_objects(good_checkpoint, value):
    rejected("kernel", good_checkpoint, kernel=value)


def valid_positive(v):
    return isinstance(v, (int, float)) and not isinstance(v, bool) and math.isfinite(v) and v > 0


SETTING_VALUES = hst.one_of(hst.floats(allow_nan=True, allow_infinity=True), hst.integers(-3, 3), hst.text(max_size=6),
                            hst.none(), hst.booleans())


@CHECK
@given(value=SETTING_VALUES)
def test_kernel_bandwidth(value):
    valid = value == "median" or valid_positive(value)
    for kernel in (st.kernels.RBF, st.kernels.IMQ, st.kernels.Matern, st.kernels.GammaExponential):
        if valid:
            assert kernel(bandwidth=value).bandwidth == value
        else:
            with pytest.raises((ValueError, TypeError), match="bandwidth"):
                kernel(bandwidth=value)


@CHECK
@given(value=SETTING_VALUES, setting=hst.sampled_from(["c", "beta", "nu", "gamma"]))
def test_kernel_shape_settings(value, setting):
    number = isinstance(value, (int, float)) and not isinstance(value, bool)
    rules = {  # the documented ranges (kernels module table)
        "c": (st.kernels.IMQ, number and valid_positive(value)),
        "beta": (st.kernels.IMQ, number and -1 < value < 0),
        "nu": (st.kernels.Matern, number and value in (0.5, 1.5, 2.5)),
        "gamma": (st.kernels.GammaExponential, number and 0 < value <= 2),
    }
    kernel, valid = rules[setting]
    if valid:
        kernel(**{setting: value})
    else:
        with pytest.raises((ValueError, TypeError), match=rf"\b{setting}\b"):
            kernel(**{setting: value})


# ---------------------------------------------------------------------- model description
@CHECK
@given(shape=hst.one_of(hst.lists(hst.integers(-2, 3), min_size=1, max_size=3).filter(lambda s: min(s) < 1),
                        hst.just(2.5), hst.just("3"), hst.just((2.0,)), hst.just((True,))))
def test_latent_shapes(shape):
    with pytest.raises((ValueError, TypeError), match="shape"):
        st.Latent(tuple(shape) if isinstance(shape, list) else shape)


@pytest.mark.parametrize("constraint", [
    "positive", None, constraints.integer_interval(0, 3), constraints.nonnegative_integer, constraints.boolean,
    constraints.interval(0.0, float("nan")), constraints.interval(2.0, 1.0), constraints.greater_than(float("nan")),
])
def test_latent_supports_that_cannot_be_sampled(constraint):
    with pytest.raises((ValueError, TypeError), match="support"):
        st.Latent((2,), constraint)


@CHECK
@given(dim=hst.one_of(hst.integers(max_value=0), hst.floats(), hst.text(max_size=3), hst.booleans()))
def test_target_dim(dim):
    with pytest.raises((ValueError, TypeError), match="dim"):
        st.Target(gaussian, dim=dim)


@pytest.mark.parametrize("latents", [{}, [("a", st.Latent())], {"a": (2,)}, {"1a": st.Latent()}, {"a b": st.Latent()}, "a"])
def test_target_latents(latents):
    with pytest.raises((ValueError, TypeError), match="latent"):
        st.Target(gaussian, latents=latents)


def test_target_needs_exactly_one_of_dim_and_latents():
    with pytest.raises(ValueError, match="dim= .* or latents="):
        st.Target(gaussian)
    with pytest.raises(ValueError, match="dim= .* or latents="):
        st.Target(gaussian, dim=2, latents={"a": st.Latent()})
    with pytest.raises(TypeError, match="log_prob must be callable"):
        st.Target("not a function", dim=2)


@CHECK
@given(dtype=hst.sampled_from([torch.int64, torch.bool, torch.complex64, torch.float64]),
       extra=hst.lists(hst.integers(1, 3), max_size=2))
def test_log_prob_output_of_the_wrong_dtype_or_shape(good_checkpoint, dtype, extra):
    assume(dtype != torch.float64 or extra)

    def log_prob(x):
        out = gaussian(x).reshape(*x.shape[:-1], *([1] * len(extra))).expand(*x.shape[:-1], *extra)
        return out.to(dtype)

    rejected("log_prob", good_checkpoint, target=st.Target(log_prob, dim=2))


@pytest.mark.parametrize("value", [3.0, "lp", None, [1.0]], ids=["float", "str", "None", "list"])
def test_log_prob_that_is_not_a_tensor(good_checkpoint, value):
    rejected("log_prob", good_checkpoint, target=st.Target(lambda x: value, dim=2))


# ---------------------------------------------------------------------- files
@pytest.mark.parametrize("value", [3, "/no/such/folder/run.pt", ".", ""])
def test_bad_checkpoint_paths(value):
    with pytest.raises((ValueError, TypeError), match="checkpoint"):
        st.svgd(TARGET, **{**FAST, "checkpoint": value})


@pytest.mark.parametrize("arg, value", [("resume", 3.5), ("resume", ["run.pt"]), ("progress", "yes")])
def test_bad_resume_and_progress(good_checkpoint, arg, value):
    rejected(arg, good_checkpoint, **{arg: value})


def test_checkpoint_every_needs_a_checkpoint():
    with pytest.raises(ValueError, match="checkpoint_every is set but checkpoint"):
        st.svgd(TARGET, checkpoint_every=3, **FAST)


def test_resume_beyond_the_requested_steps(good_checkpoint):
    with pytest.raises(ValueError, match="steps: the checkpoint is already at step 1, beyond steps=0"):
        st.svgd(TARGET, **{**FAST, "steps": 0, "resume": good_checkpoint})


# ---------------------------------------------------------------------- data given with a target
@CHECK
@given(lengths=hst.lists(hst.integers(0, 6), min_size=2, max_size=4),
       batch_size=hst.one_of(hst.none(), hst.integers(-2, 8), hst.just(2.5), hst.just("all")))
def test_data_of_mismatched_lengths_or_bad_batch_sizes(lengths, batch_size):
    # every data tensor must share the observation axis; the error names `data` and lists the lengths
    data = {f"x{i}": torch.zeros(n, 2) for i, n in enumerate(lengths)}

    def log_likelihood(p, d):  # (..., n_obs)
        return -0.5 * ((d["x0"][..., 0] - p["mu"][..., None]) ** 2)

    same = len(set(lengths)) == 1 and lengths[0] > 0
    good_batch = batch_size is None or (isinstance(batch_size, int) and 1 <= batch_size <= lengths[0])
    if same and good_batch:
        target = st.Target(lambda p: -p["mu"] ** 2, latents={"mu": st.Latent()}, log_likelihood=log_likelihood,
                           data=data, batch_size=batch_size)
        assert target.dim == 1
        return
    with pytest.raises((ValueError, TypeError)) as info:
        st.Target(lambda p: -p["mu"] ** 2, latents={"mu": st.Latent()}, log_likelihood=log_likelihood,
                  data=data, batch_size=batch_size)
    message = str(info.value)
    assert ("data" in message) or ("batch_size" in message), message
    if not same and all(n > 0 for n in lengths):
        assert all(f"'x{i}': {n}" in message for i, n in enumerate(lengths)), message
