"""load_adapter and the Adapter's output checks.

The accepted forms and the call signature are the project's public contract
(DESIGN.md, "The call signature"); the fixture modules below are written for these
tests. Every computed output is compared with convwitness's float64 reference on
Dumoulin & Visin 2016 (arXiv:1603.07285) Figure 1.1, whose result is published.
"""
from __future__ import annotations

import sys
import textwrap
import uuid

import numpy as np
import pytest

import convwitness
from convwitness import (Adapter, AdapterLoadError, AdapterOutputError, Capabilities, ConvSpec,
                         load_adapter, wrap)

# Dumoulin & Visin 2016, Figure 1.1
FIG_X = np.array([[3, 3, 2, 1, 0], [0, 0, 1, 3, 1], [3, 1, 2, 2, 3], [2, 0, 0, 2, 2], [2, 0, 0, 0, 1]],
                 dtype=np.float32)[None, None]
FIG_W = np.array([[0, 1, 2], [2, 2, 0], [0, 1, 2]], dtype=np.float32)[None, None]
FIG_Y = np.array([[12, 12, 17], [10, 17, 19], [9, 6, 14]], dtype=np.float32)
SPEC = ConvSpec(batch=1, in_channels=1, out_channels=1, input_size=(5, 5), kernel_size=(3, 3),
                bias=False)

FIXTURE = '''
import numpy as np
from convwitness.numerics import reference as _ref
from convwitness.geometry.spec import ConvSpec as _Spec


def _y(x, w, b, stride, padding, dilation, groups):
    spec = _Spec(batch=x.shape[0], in_channels=x.shape[1], out_channels=w.shape[0],
                 input_size=x.shape[2:], kernel_size=w.shape[2:], stride=stride,
                 padding=padding, dilation=dilation, groups=groups, bias=b is not None,
                 dtype=str(x.dtype))
    return _ref.forward(spec, x, w, b).astype(x.dtype)


def conv(x, w, b, *, stride, padding, dilation, groups):
    return _y(x, w, b, stride, padding, dilation, groups)


def conv_kwargs(x, w, b, **kw):
    return _y(x, w, b, kw["stride"], kw["padding"], kw["dilation"], kw["groups"])


class Impl:
    name = "fixture-impl"
    version = "1.2.3"

    def forward(self, x, w, b, *, stride, padding, dilation, groups):
        return _y(x, w, b, stride, padding, dilation, groups)


OBJ = Impl()


class Holder:
    inner = Impl()


def make():
    return Impl()


def make_function():
    return conv


def two_args(x, w):
    return x


def no_keywords(x, w, b):
    return x


class NeedsArgs:
    def __init__(self, device):
        self.device = device

    def forward(self, x, w, b, **kw):
        return x


def make_nothing():
    return 42


def make_broken():
    raise RuntimeError("no accelerator found")


class BrokenInit:
    def __init__(self):
        raise OSError("driver library missing")

    def forward(self, x, w, b, **kw):
        return x


NUMBER = 7
'''


@pytest.fixture
def fixture_package(tmp_path, monkeypatch):
    """A package importable as ``<name>.impls`` and the path of the same code as a file."""
    name = f"cwfix_{uuid.uuid4().hex[:10]}"
    pkg = tmp_path / name
    pkg.mkdir()
    (pkg / "__init__.py").write_text("")
    (pkg / "impls.py").write_text(FIXTURE)
    (tmp_path / "my_impls.py").write_text(FIXTURE)
    (tmp_path / "broken.py").write_text("raise RuntimeError('import-time failure')\n")
    monkeypatch.syspath_prepend(str(tmp_path))
    yield name, tmp_path
    for mod in [m for m in sys.modules if m.startswith(name)]:
        del sys.modules[mod]


def _computes_figure(adapter: Adapter):
    y = adapter.forward(SPEC, FIG_X, FIG_W, None)
    assert y.dtype == np.float32 and (y[0, 0] == FIG_Y).all()      # Dumoulin & Visin, Fig. 1.1


def _one_line_error(spec: str, cls=AdapterLoadError) -> str:
    with pytest.raises(cls) as info:
        load_adapter(spec)
    msg = str(info.value)
    assert "\n" not in msg and msg, msg
    return msg


# -- accepted forms ---------------------------------------------------------------------
def test_builtin_name():
    a = load_adapter("reference")
    assert isinstance(a, Adapter) and a.name == "reference" and a.version == convwitness.__version__
    assert a.passes == {"forward", "backward", "transposed"}
    assert load_adapter("  reference ").name == "reference"
    _computes_figure(a)


@pytest.mark.parametrize("attr, name", [
    ("OBJ", "fixture-impl"),               # an adapter object
    ("Impl", "fixture-impl"),              # a class, instantiated without arguments
    ("make", "fixture-impl"),              # a zero-argument factory of an adapter object
    ("make_function", "conv"),             # a zero-argument factory of a forward function
    ("conv", "conv"),                      # a plain forward function
    ("conv_kwargs", "conv_kwargs"),        # ... taking the keywords as **kw
    ("Holder.inner", "fixture-impl"),      # a dotted attribute path
])
def test_module_attr(fixture_package, attr, name):
    pkg, _ = fixture_package
    a = load_adapter(f"{pkg}.impls:{attr}")
    assert isinstance(a, Adapter) and a.name == name
    assert a.source == f"{pkg}.impls:{attr}"
    assert a.passes == {"forward"}
    _computes_figure(a)


@pytest.mark.parametrize("attr", ["OBJ", "Impl", "make", "make_function", "conv"])
def test_file_attr_absolute_and_relative(fixture_package, monkeypatch, attr):
    _, where = fixture_package
    _computes_figure(load_adapter(f"{where / 'my_impls.py'}:{attr}"))
    monkeypatch.chdir(where)
    a = load_adapter(f"my_impls.py:{attr}")
    _computes_figure(a)
    assert a.source == f"my_impls.py:{attr}"


def test_objects_are_wrapped_directly():
    def forward(x, w, b, *, stride, padding, dilation, groups):
        return load_adapter("reference").forward(SPEC, x, w, b)
    a = load_adapter(forward)
    assert a.name == "forward"
    _computes_figure(a)
    assert wrap(a) is a                         # idempotent


# -- bad specs: one clear line ----------------------------------------------------------------
def test_unknown_name_did_you_mean():
    msg = _one_line_error("refrence")
    # the closest built-in is offered first (difflib ranks 'onnx-reference' after it)
    assert "unknown adapter 'refrence'" in msg and "did you mean 'reference'" in msg
    assert "package.module:attr" in msg and "path/to/file.py:attr" in msg and "exec:COMMAND" in msg
    msg = _one_line_error("qqqqqq")
    assert "did you mean" not in msg and "reference" in msg     # lists the built-ins


def test_exec_program_without_hello_says_what_to_check():
    """A program that never writes its hello (docs/wire-protocol.md: message 1)."""
    with pytest.raises(AdapterLoadError) as info:
        load_adapter(f"exec:{sys.executable} -c 'import time; time.sleep(60)'", start_timeout=2)
    msg = str(info.value)
    assert "\n" not in msg and "no complete hello within 2 s" in msg
    assert "flushes stdout" in msg and "docs/wire-protocol.md" in msg


def test_empty_spec():
    msg = _one_line_error("   ")
    assert "empty" in msg and "package.module:attr" in msg


def test_module_not_importable():
    msg = _one_line_error("cw_no_such_module_42:conv")
    assert "cannot import module 'cw_no_such_module_42'" in msg
    assert "No module named 'cw_no_such_module_42'" in msg        # the ImportError's message


def test_module_raising_on_import_and_missing_file(fixture_package):
    _, where = fixture_package
    msg = _one_line_error(f"{where / 'broken.py'}:conv")
    assert "raised RuntimeError: import-time failure" in msg
    msg = _one_line_error(f"{where / 'absent.py'}:conv")
    assert "does not exist" in msg and "absent.py" in msg


def test_attribute_missing_lists_what_is_there(fixture_package):
    pkg, where = fixture_package
    msg = _one_line_error(f"{pkg}.impls:Impll")
    assert "has no attribute 'Impll'" in msg and "did you mean Impl" in msg
    assert "it has:" in msg and "OBJ" in msg and "make" in msg and "conv" in msg
    msg = _one_line_error(f"{where / 'my_impls.py'}:nothing_like_it")
    assert "has no attribute 'nothing_like_it'" in msg and "Impl" in msg
    msg = _one_line_error(f"{pkg}.impls:")
    assert "MODULE:ATTR" in msg


@pytest.mark.parametrize("attr", ["two_args", "no_keywords"])
def test_wrong_signature_names_the_expected_one(fixture_package, attr):
    pkg, _ = fixture_package
    msg = _one_line_error(f"{pkg}.impls:{attr}")
    assert f"{attr}(" in msg
    assert "f(x, w, b, *, stride, padding, dilation, groups) -> y" in msg


def test_unusable_attributes(fixture_package):
    pkg, _ = fixture_package
    msg = _one_line_error(f"{pkg}.impls:NeedsArgs")
    assert "NeedsArgs must be constructible without arguments" in msg and "device" in msg
    msg = _one_line_error(f"{pkg}.impls:NUMBER")
    assert "int object is neither an adapter" in msg
    msg = _one_line_error(f"{pkg}.impls:make_nothing")
    assert "factory returned int" in msg


def test_factory_that_raises_gives_one_line(fixture_package):
    pkg, _ = fixture_package
    msg = _one_line_error(f"{pkg}.impls:make_broken")
    assert "make_broken() raised RuntimeError: no accelerator found" in msg
    msg = _one_line_error(f"{pkg}.impls:BrokenInit")
    assert "BrokenInit() raised OSError: driver library missing" in msg


def test_claimed_pass_without_method():
    class Claims:
        capabilities = Capabilities(passes={"forward", "backward"})

        def forward(self, x, w, b, **kw):
            return x
    with pytest.raises(AdapterLoadError) as info:
        wrap(Claims())
    assert "claim passes ['backward']" in str(info.value) and "backward()" in str(info.value)
    with pytest.raises(AdapterLoadError, match="expected a forward function"):
        wrap(3)


# -- output checking ----------------------------------------------------------------------------
def _returning(value):
    def forward(x, w, b, *, stride, padding, dilation, groups):
        return value
    return wrap(forward, name="planted")


EXPECTED = "expected numpy.ndarray shape=(1, 1, 3, 3) dtype=float32"


@pytest.mark.parametrize("value, came, fix", [
    (FIG_Y.tolist(), "got list of length 3", "fix: return numpy arrays"),
    (None, "got None", "fix: return the y array instead of None"),
    (np.zeros((1, 1, 3, 4), np.float32), "got shape=(1, 1, 3, 4)", "fix: check the output-size formula"),
    (np.zeros((1, 3, 3, 1), np.float32), "got shape=(1, 3, 3, 1)", "and the layout"),
    (np.zeros((1, 1, 3, 3), np.float64), "got dtype=float64", "fix: return the dtype of the inputs (float32)"),
    (np.float32(1.0), "got numpy.float32", "fix: return numpy arrays"),
])
def test_forward_output_errors(value, came, fix):
    with pytest.raises(AdapterOutputError) as info:
        _returning(value).forward(SPEC, FIG_X, FIG_W, None)
    msg = str(info.value)
    assert "\n" not in msg
    assert msg.startswith("adapter planted forward: y ")
    assert EXPECTED in msg and came in msg and fix in msg


def test_backward_output_errors():
    g = np.ones((1, 1, 3, 3), np.float32)
    good = (np.zeros((1, 1, 5, 5), np.float32), np.zeros((1, 1, 3, 3), np.float32))

    class Back:
        def __init__(self, out):
            self.out = out

        def forward(self, x, w, b, **kw):
            return x

        def backward(self, x, w, b, grad_y, **kw):
            return self.out

    with pytest.raises(AdapterOutputError) as info:
        wrap(Back(good)).backward(SPEC, FIG_X, FIG_W, None, g)
    assert "expected a tuple (grad_x, grad_w, grad_b), got tuple of length 2" in str(info.value)
    assert "grad_b None when b is None" in str(info.value)
    assert wrap(Back(good + (None,))).backward(SPEC, FIG_X, FIG_W, None, g)[2] is None
    with pytest.raises(AdapterOutputError) as info:
        wrap(Back((good[0], good[0], None))).backward(SPEC, FIG_X, FIG_W, None, g)
    assert "grad_w expected numpy.ndarray shape=(1, 1, 3, 3) dtype=float32, got shape=(1, 1, 5, 5)" \
        in str(info.value)
    b = np.zeros(1, np.float32)
    with pytest.raises(AdapterOutputError) as info:
        wrap(Back(good + (None,))).backward(SPEC.replace(bias=True), FIG_X, FIG_W, b, g)
    assert "grad_b expected numpy.ndarray shape=(1,) dtype=float32, got None" in str(info.value)
    with pytest.raises(AdapterOutputError, match="offers no backward"):
        _returning(None).backward(SPEC, FIG_X, FIG_W, None, g)


def test_our_own_import_error_is_a_bug_not_an_unavailable_adapter(monkeypatch):
    """An ImportError naming one of our modules (Python docs, ImportError.name: "the name
    of the module that was attempted to be imported") is a bug to report, never a skip as
    for a missing optional library; a missing third-party module stays 'unavailable'."""
    import types
    import convwitness.boundary.loading as loading
    from convwitness.errors import AdapterLoadError, AdapterUnavailable

    def broken():
        raise ImportError("cannot import name 'X' from 'convwitness.adapters.reference'",
                          name="convwitness.adapters.reference")

    def missing():
        raise ModuleNotFoundError("No module named 'somelib'", name="somelib")

    fake = types.ModuleType("fake_builtin_module")
    fake.broken, fake.missing = broken, missing
    monkeypatch.setitem(sys.modules, "fake_builtin_module", fake)
    with pytest.raises(AdapterLoadError, match="bug in convwitness, not a missing dependency"):
        loading._load_builtin("broken", "fake_builtin_module:broken")
    with pytest.raises(AdapterUnavailable, match="somelib"):
        loading._load_builtin("missing", "fake_builtin_module:missing")
