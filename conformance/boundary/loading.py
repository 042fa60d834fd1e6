"""Loading ``--adapter`` specs.

Accepted forms:

* a built-in name (``reference``, ``torch``, ``jax``, ``onnxruntime``, ``scipy``, ...;
  ``convwitness adapters`` lists them);
* ``package.module:attr``;
* ``path/to/file.py:attr``;
* ``exec:COMMAND ARGS...`` (a foreign program speaking the wire protocol).

``attr`` may be an adapter object, a class (instantiated without arguments), a
zero-argument factory, or a plain forward function. Every failure is one line.
"""
from __future__ import annotations

import difflib
import importlib
import importlib.util
import inspect
import os
import sys

from .contract import Adapter, wrap
from ..errors import AdapterLoadError, AdapterUnavailable

__all__ = ["load_adapter", "builtin_names"]


def builtin_names() -> list[str]:
    return list(_builtins())


def _builtins() -> dict:
    from convwitness.adapters import BUILTINS
    return BUILTINS


def load_adapter(spec, **options) -> Adapter:
    """An :class:`Adapter` for ``spec`` (a string as above, or an object/function)."""
    if not isinstance(spec, str):
        return wrap(spec, source=repr(spec))
    text = spec.strip()
    if not text:
        raise AdapterLoadError("--adapter is empty; give a built-in name (see `convwitness "
                               "adapters`), package.module:attr, path/to/file.py:attr or exec:COMMAND")
    if text.startswith("exec:"):
        from .wire.client import ExecAdapter
        return wrap(ExecAdapter(text[len("exec:"):].strip(), **options), source=text)
    builtins = _builtins()
    if ":" not in text:
        if text in builtins:
            return _load_builtin(text, builtins[text])
        close = difflib.get_close_matches(text, list(builtins), n=3, cutoff=0.5)
        hint = f"did you mean {' or '.join(repr(c) for c in close)}? " if close else ""
        raise AdapterLoadError(
            f"unknown adapter {text!r}: {hint}expected a built-in name ({', '.join(builtins)}), "
            "package.module:attr, path/to/file.py:attr or exec:COMMAND ARGS (a program speaking "
            "the wire protocol)")
    where, _, attr = text.rpartition(":")
    if not attr or not where:
        raise AdapterLoadError(f"adapter spec {text!r}: expected MODULE:ATTR or FILE.py:ATTR with both parts")
    if where.endswith(".py") or os.sep in where or "/" in where:
        module = _import_file(where, text)
    else:
        module = _import_module(where, text)
    return _resolve(module, attr, text)


def _load_builtin(name: str, target: str) -> Adapter:
    mod_name, _, attr = target.partition(":")
    try:
        module = importlib.import_module(mod_name)
        factory = getattr(module, attr)
        obj = factory()
    except AdapterUnavailable:
        raise
    except ImportError as exc:
        top = (getattr(exc, "name", None) or "").partition(".")[0]
        if top in ("convwitness", "conformance", "adapters"):
            # our own code failed to import: a bug to fix, never an optional library to skip
            raise AdapterLoadError(f"adapter {name!r}: convwitness's own code failed to import "
                                   f"({exc}); this is a bug in convwitness, not a missing "
                                   "dependency: please report it") from exc
        raise AdapterUnavailable(f"adapter {name!r} is unavailable: {exc}") from None
    return wrap(obj, source=name)


def _import_module(where: str, text: str):
    try:
        return importlib.import_module(where)
    except ImportError as exc:
        raise AdapterLoadError(f"adapter {text!r}: cannot import module {where!r}: {exc}") from None
    except Exception as exc:  # the module itself raised while importing
        raise AdapterLoadError(f"adapter {text!r}: importing {where!r} raised "
                               f"{type(exc).__name__}: {exc}") from None


def _import_file(where: str, text: str):
    path = os.path.abspath(where)
    if not os.path.isfile(path):
        raise AdapterLoadError(f"adapter {text!r}: file {where!r} does not exist; give a path to "
                               "a .py file, relative to the current directory")
    name = "convwitness_user_" + os.path.splitext(os.path.basename(path))[0].replace("-", "_")
    spec = importlib.util.spec_from_file_location(name, path)
    if spec is None or spec.loader is None:
        raise AdapterLoadError(f"adapter {text!r}: {where!r} cannot be loaded as a Python module")
    module = importlib.util.module_from_spec(spec)
    sys.modules[name] = module
    try:
        spec.loader.exec_module(module)
    except Exception as exc:
        del sys.modules[name]
        raise AdapterLoadError(f"adapter {text!r}: running {where!r} raised "
                               f"{type(exc).__name__}: {exc}") from None
    return module


def _resolve(module, attr: str, text: str) -> Adapter:
    obj = module
    for part in attr.split("."):
        if not hasattr(obj, part):
            names = sorted(n for n in dir(obj) if not n.startswith("_"))
            close = difflib.get_close_matches(part, names, n=3)
            hint = f" (did you mean {', '.join(close)}?)" if close else ""
            raise AdapterLoadError(
                f"adapter {text!r}: {getattr(module, '__name__', module)} has no attribute "
                f"{part!r}{hint}; it has: {', '.join(names[:20])}{' ...' if len(names) > 20 else ''}")
        obj = getattr(obj, part)
    return wrap(_instantiate(obj, text), source=text)


_SIGNATURE = "f(x, w, b, *, stride, padding, dilation, groups) -> y"


def _instantiate(obj, text: str):
    """Adapter object / class / zero-argument factory / forward function -> target."""
    if inspect.isclass(obj):
        try:
            return obj()
        except TypeError as exc:
            raise AdapterLoadError(f"adapter {text!r}: class {obj.__name__} must be constructible "
                                   f"without arguments ({exc})") from None
        except AdapterLoadError:
            raise
        except Exception as exc:
            raise AdapterLoadError(f"adapter {text!r}: {obj.__name__}() raised "
                                   f"{type(exc).__name__}: {exc}") from None
    if (hasattr(obj, "forward") and callable(obj.forward)) or \
            (hasattr(obj, "quantized") and callable(obj.quantized)):   # a quantized-only adapter
        return obj
    if not callable(obj):
        raise AdapterLoadError(f"adapter {text!r}: {type(obj).__name__} object is neither an adapter "
                               f"(with forward()), a class, a factory nor a function {_SIGNATURE}")
    try:
        sig = inspect.signature(obj)
    except (TypeError, ValueError):
        return obj
    params = list(sig.parameters.values())
    positional = [p for p in params if p.kind in (p.POSITIONAL_ONLY, p.POSITIONAL_OR_KEYWORD)]
    required = [p for p in params if p.default is p.empty and
                p.kind not in (p.VAR_POSITIONAL, p.VAR_KEYWORD)]
    has_var_kw = any(p.kind == p.VAR_KEYWORD for p in params)
    if not required:
        try:
            made = obj()
        except AdapterLoadError:
            raise
        except Exception as exc:
            raise AdapterLoadError(f"adapter {text!r}: factory {getattr(obj, '__name__', obj)}() "
                                   f"raised {type(exc).__name__}: {exc}") from None
        if hasattr(made, "forward") or hasattr(made, "quantized") or callable(made):
            return made
        raise AdapterLoadError(f"adapter {text!r}: factory returned {type(made).__name__}, expected "
                               f"an adapter object or a function {_SIGNATURE}")
    names = {p.name for p in params}
    if len(positional) >= 3 and (has_var_kw or {"stride", "padding", "dilation", "groups"} <= names):
        return obj
    raise AdapterLoadError(f"adapter {text!r}: {getattr(obj, '__name__', obj)}{sig} does not match "
                           f"the forward signature {_SIGNATURE}")
