"""Real-library findings of convwitness: does each one reproduce on this machine?

Run:  python scripts/library_findings.py            # every finding
      python scripts/library_findings.py torch.channels_last_c1 ...   # some of them

Each finding is a small program that calls the library directly (no convwitness),
run in a child process once with one intra-op thread (OMP_NUM_THREADS=1) and once with
the library's default (one per logical CPU), because torch's oneDNN kernels differ
by thread count and instruction set. A child prints BUG when the library misbehaves
and OK when it is right; a child killed by a signal counts as the crash the finding
describes (``crash`` findings) or as an unexpected crash (others). The environment
(CPU model, numpy's CPU features, library builds) is printed first, the same record
that report.json's "environment" keeps, so that a finding is quoted with where it
holds. Findings are observations about a library on one machine; the project's tests
never depend on them (tests/test_builtin_adapters.py tests only what convwitness does
with such a case).
"""
from __future__ import annotations

import json
import os
import subprocess
import sys
import textwrap
from dataclasses import dataclass

from convwitness.report.document import library_versions
from convwitness.report.machine import cpu_info, library_builds


@dataclass(frozen=True)
class Finding:
    id: str
    library: str
    claim: str
    code: str               # prints BUG or OK (or dies, for kind "crash")
    kind: str = "value"     # "value" | "crash"
    status: str = "current"  # "current" | "withdrawn" | "unconfirmed"
    seen: str = ""          # where it was seen to hold (or not)


FINDINGS = (
    Finding(
        "torch.channels_last_c1", "torch",
        "float32 channels-last conv2d with C_in=1, batch 2 and a strided window covering the "
        "last axis once drops terms (ones: 3 expected everywhere, some 2 and 0 come)",
        """
        import numpy as np, torch
        F = torch.nn.functional
        x = torch.from_numpy(np.ones((2, 12, 3, 1), np.float32)).permute(0, 3, 1, 2)  # NHWC view
        w = torch.from_numpy(np.ones((1, 1, 3, 1), np.float32)).permute(0, 3, 1, 2)
        y = F.conv2d(x, w, stride=(1, 2))
        print("OK" if bool((y == 3).all()) else "BUG", y.flatten().tolist()[:12])
        """,
        seen="AMD EPYC with AVX-512 (numpy: AVX512F/BW/VL/BF16), torch 2.13.0+cpu, oneDNN "
             "v3.12.0, 2 threads: BUG; 1 thread or ONEDNN_MAX_CPU_ISA=AVX2: OK. Reported BUG "
             "on an AVX2 machine without AVX-512 as well (thread count not recorded)"),
    Finding(
        "torch.float16_sigsegv", "torch",
        "float16 conv2d x (1,1,2,1), w (1,1,1,2), stride (1,2), padding (0,3), dilation (1,2) "
        "dies with SIGSEGV (float32/64 and bfloat16 do not)",
        """
        import torch
        F = torch.nn.functional
        x = torch.full((1, 1, 2, 1), 1.5, dtype=torch.float16)
        w = torch.ones((1, 1, 1, 2), dtype=torch.float16)
        F.conv2d(x, w, None, stride=(1, 2), padding=(0, 3), dilation=(1, 2))
        print("OK")
        """, kind="crash",
        seen="torch 2.13.0+cpu on an AVX2 machine without AVX-512: crash; AMD EPYC with "
             "AVX-512 (AVX512_BF16, no AVX512-FP16), 1 and 2 threads, ONEDNN_MAX_CPU_ISA=AVX2 "
             "too: no crash"),
    Finding(
        "torch.float16_slow_gradients", "torch",
        "where torch runs float16 on its own Slow* kernels (not oneDNN), the forward is "
        "correctly rounded but grad_input/grad_weight are not (summed in float16); "
        "adapters/torch_nn.py declares them so (_slow_path_backward_models)",
        """
        import torch
        torch.manual_seed(0)
        F = torch.nn.functional
        x = torch.randn(2, 3, 7, 7).half().requires_grad_()
        w = torch.randn(4, 3, 3, 3).half().requires_grad_()
        be = str(torch._C._select_conv_backend(x, w, None, [1, 1], [0, 0], [1, 1], False, [0, 0], 1))
        y = F.conv2d(x, w); g = torch.randn_like(y)
        gx, gw = torch.autograd.grad(y, (x, w), g)
        x64, w64 = x.detach().double().requires_grad_(), w.detach().double().requires_grad_()
        gx64, gw64 = torch.autograd.grad(F.conv2d(x64, w64), (x64, w64), g.double())
        off = (gx.double() != gx64.half().double()).float().mean().item()
        print("BUG" if off > 0 else "OK", be.rpartition(".")[2], f"grad_input not correctly rounded: {off:.2f}")
        """,
        seen="AMD EPYC (AVX2 and AVX-512 machines), torch 2.13.0+cpu: Slow2d picked, 12-54% "
             "of grad_input elements off (scripts/probe_torch_fp16.py for 1-3 D)"),
    Finding(
        "torch.bfloat16_conv3d", "torch",
        "WITHDRAWN: a strided, padded bfloat16 conv3d was said to misplace outputs",
        """
        import torch
        F = torch.nn.functional
        x = F.pad(torch.ones(3, 1, 1, 2, 4), (0, 0, 0, 1, 1, 1)); w = torch.ones(1, 1, 1, 1, 3)
        bad = sum(not torch.equal(F.conv3d(x, w, stride=(1, 1, 2)),
                                  F.conv3d(x.bfloat16(), w.bfloat16(), stride=(1, 1, 2)).float())
                  for _ in range(300))
        print("BUG" if bad else "OK", f"{bad}/300 repetitions differ from float32")
        """, status="withdrawn",
        seen="never reproduced: AMD EPYC with AVX-512 (1 and 2 threads, ATEN_CPU_CAPABILITY "
             "avx2/avx512, ONEDNN_MAX_CPU_ISA AVX2/AVX512_CORE_BF16) and an AVX2 machine "
             "without AVX-512 (1 and 2 threads): OK, 300 repetitions each; the environment "
             "of the original observation was not recorded"),
    Finding(
        "jax.negative_padding_float32", "jax",
        "float32 2-D conv with one axis padded (-1, +1) and a kernel wider than 1 returns "
        "values read from outside the input; float64 is right",
        """
        import numpy as np
        from jax import lax
        worst = 0.0
        for seed in range(3):
            r = np.random.default_rng(seed)
            x = r.standard_normal((1, 4, 7, 7)).astype(np.float32)
            w = r.standard_normal((4, 4, 2, 2)).astype(np.float32)
            y = np.asarray(lax.conv_general_dilated(x, w, (1, 1), [(-1, 1), (0, 0)]))
            y64 = np.asarray(lax.conv_general_dilated(x.astype(np.float64), w.astype(np.float64),
                                                      (1, 1), [(-1, 1), (0, 0)]))
            worst = max(worst, float(np.abs(y - y64).max()))
        # a right float32 result of 16 products of normal numbers is within ~1e-5 of float64
        print("BUG" if not worst < 1e-3 else "OK", f"largest float32-float64 difference {worst:.3g}")
        """,
        seen="jax/jaxlib 0.10.2 CPU, AMD EPYC with AVX-512, 1 and 2 threads: BUG for seeds 1 and 2, "
             "not for seed 0"),
    Finding(
        "jax.vjp_strided_abort", "jax",
        "compiling jax.vjp of a strided conv (x (1,1,2,4), w (1,1,3,2), stride (1,2), "
        "padding 1) aborts the process inside XLA (\"Window dimensions do not match RHS shape\")",
        """
        import numpy as np, jax
        from jax import lax
        x = np.ones((1, 1, 2, 4), np.float32); w = np.ones((1, 1, 3, 2), np.float32)
        y, vjp = jax.vjp(lambda x: lax.conv_general_dilated(x, w, (1, 2), [(1, 1), (1, 1)]), x)
        vjp(np.ones(y.shape, np.float32))
        print("OK")
        """, kind="crash", seen="jax/jaxlib 0.10.2 CPU, AMD EPYC"),
    Finding(
        "jax.subnormal_flush", "jax",
        "XLA on CPU flushes subnormal float32 inputs to zero (1e-40 * 1 gives 0)",
        """
        import numpy as np
        from jax import lax
        x = np.full((1, 1, 4, 4), 1e-40, np.float32); w = np.ones((1, 1, 1, 1), np.float32)
        y = np.asarray(lax.conv_general_dilated(x, w, (1, 1), [(0, 0), (0, 0)]))
        print("BUG" if float(y.ravel()[0]) == 0.0 else "OK", float(y.ravel()[0]))
        """, seen="jax/jaxlib 0.10.2 CPU, AMD EPYC with AVX-512"),
    Finding(
        "jax.nan_crosses_groups", "jax",
        "a float64 grouped convolution lets a NaN of one group reach the outputs of another",
        """
        import numpy as np, jax
        jax.config.update("jax_enable_x64", True)
        from jax import lax
        x = np.ones((1, 4, 6, 6)); x[0, 0, 2, 2] = np.nan          # NaN in group 0 only
        w = np.ones((4, 2, 3, 3))
        y = np.asarray(lax.conv_general_dilated(x, w, (1, 1), [(0, 0), (0, 0)], feature_group_count=2))
        print("BUG" if np.isnan(y[0, 2:]).any() else "OK", int(np.isnan(y[0, 2:]).sum()), "NaN in group 1")
        """, status="unconfirmed",
        seen="reported by a convwitness run with jax 0.10.2 CPU (machine and geometry not "
             "recorded); this program does not show it on AMD EPYC with AVX-512"),
    Finding(
        "onnxruntime.output_padding_refused", "onnxruntime",
        "ConvTranspose refuses output_padding >= stride although the geometry is valid when "
        "the dilation is larger (stride 1, dilation 2, output_padding 1)",
        """
        import numpy as np, onnxruntime as ort
        from onnx import helper, TensorProto
        node = helper.make_node("ConvTranspose", ["X", "W"], ["Y"], strides=[1], dilations=[2],
                                output_padding=[1], pads=[0, 0])
        io = lambda n: helper.make_tensor_value_info(n, TensorProto.FLOAT, None)
        m = helper.make_model(helper.make_graph([node], "g", [io("X"), io("W")], [io("Y")]),
                              opset_imports=[helper.make_opsetid("", 22)])
        m.ir_version = 10
        ort.set_default_logger_severity(4)
        s = ort.InferenceSession(m.SerializeToString(), providers=["CPUExecutionProvider"])
        try:
            y = s.run(None, {"X": np.ones((1, 2, 4), np.float32), "W": np.ones((2, 3, 2), np.float32)})[0]
            print("OK", y.shape)
        except Exception as exc:
            print("BUG", str(exc).splitlines()[0].split("Status Message:")[-1].strip()[:140])
        """, seen="onnxruntime 1.32.0 CPU, AMD EPYC with AVX-512"),
    Finding(
        "torch.quantized_conv_transpose_x86", "torch",
        "quantized conv_transpose1d (uint8 x, int8 w, C_in=2 -> C_out=3, k=3, padding 1, "
        "output_padding 0) under the default quantized engine x86 returns values up to 70 "
        "output units from the transposed convolution; fbgemm and qnnpack are exact "
        "(convwitness: torch-quant-transposed, scripts/probe_quant_transposed.py)",
        """
        import numpy as np, torch, warnings
        warnings.filterwarnings("ignore")
        r = np.random.default_rng(0)
        x = torch.from_numpy(r.integers(0, 20, (1, 2, 2)).astype(np.uint8))
        w = torch.from_numpy(r.integers(-5, 6, (2, 3, 3)).astype(np.int8))
        xq = torch._make_per_tensor_quantized_tensor(x, 1.0, 0)
        wq = torch._make_per_tensor_quantized_tensor(w, 1.0, 0)
        torch.backends.quantized.engine = "x86"
        packed = torch.ops.quantized.conv_transpose1d_prepack(wq, None, [1], [1], [0], [1], 1)
        y = torch.ops.quantized.conv_transpose1d(xq, packed, 1.0, 128).int_repr().double()
        exact = torch.nn.functional.conv_transpose1d(x.double(), w.double(), padding=1) + 128
        off = (y - exact.clamp(0, 255)).abs().max().item()
        print("BUG" if off > 1 else "OK", f"largest |y - exact| {off:g} output units")
        """, seen="torch 2.13.0+cpu, AMD EPYC with AVX-512, 1 and 2 threads: BUG (70 units); "
                  "engines fbgemm and qnnpack: exact"),
)


def run_child(code: str, threads: str | None, timeout: float = 300.0) -> tuple[str, str]:
    """(outcome, detail): BUG / OK / CRASH(signal) / ERROR, with the child's last line."""
    env = dict(os.environ)
    if threads is not None:
        env["OMP_NUM_THREADS"] = threads
    try:
        res = subprocess.run([sys.executable, "-c", textwrap.dedent(code)], capture_output=True,
                             text=True, timeout=timeout, env=env)
    except subprocess.TimeoutExpired:
        return "TIMEOUT", f"no answer within {timeout:.0f} s"
    lines = (res.stdout.strip().splitlines() or [""])
    if res.returncode < 0 or res.returncode in (134, 139):
        return "CRASH", f"return code {res.returncode}"
    if res.returncode != 0:
        return "ERROR", (res.stderr.strip().splitlines() or [""])[-1][:200]
    word, _, detail = lines[-1].partition(" ")
    return word, detail


def reproduces(f: Finding, outcome: str) -> bool:
    return outcome == ("CRASH" if f.kind == "crash" else "BUG")


def main(argv: list[str]) -> int:
    chosen = [f for f in FINDINGS if not argv or f.id in argv]
    unknown = set(argv) - {f.id for f in FINDINGS}
    if unknown:
        print(f"unknown finding(s) {sorted(unknown)}; expected some of {[f.id for f in FINDINGS]}",
              file=sys.stderr)
        return 2
    libs = sorted({f.library for f in chosen})
    print("environment:", json.dumps({"cpu": cpu_info(), "libraries": library_versions(),
                                      "builds": library_builds(*libs)}))
    for f in chosen:
        for threads in ("1", None):
            outcome, detail = run_child(f.code, threads)
            print(json.dumps({"finding": f.id, "status": f.status, "library": f.library,
                              "threads": threads or "default", "reproduces_here": reproduces(f, outcome),
                              "outcome": outcome, "detail": detail, "claim": f.claim,
                              "seen": f.seen}))
    return 0


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))
