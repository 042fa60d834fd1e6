"""What convwitness found in TensorFlow's CPU convolutions, reproduced with tf alone.

Run: python3 scripts/probe_tensorflow.py   (needs tensorflow-cpu; prints the environment,
then one block per finding: what came, and what the definition of the convolution gives)
"""
import os
import platform
import sys

os.environ.setdefault("TF_CPP_MIN_LOG_LEVEL", "2")

import numpy as np  # noqa: E402
import tensorflow as tf  # noqa: E402


def attempt(f):
    try:
        return f(), None
    except Exception as exc:  # noqa: BLE001 - the library's own error is the finding
        return None, f"{type(exc).__name__}: {str(exc).splitlines()[0][:200]}"


print(f"python {sys.version.split()[0]}, numpy {np.__version__}, tensorflow {tf.__version__}, "
      f"{platform.platform()}")

print("\n1. tf.nn.convolution with batch 0 returns the input's shape, not the output's")
got, err = attempt(lambda: tf.nn.convolution(np.zeros((0, 9, 9, 4), np.float32),
                                             np.ones((3, 3, 4, 6), np.float32), padding="VALID"))
print(f"   x (0, 9, 9, 4), w (3, 3, 4, 6), VALID: expected shape (0, 7, 7, 6); got "
      f"{err or tuple(got.shape)}")
got, err = attempt(lambda: tf.nn.bias_add(tf.nn.convolution(np.zeros((0, 1, 1), np.float32),
                                                            np.ones((1, 1, 2), np.float32),
                                                            padding="VALID"),
                                          np.ones(2, np.float32)))
print(f"   then bias_add with 2 channels: {err or tuple(got.shape)}")

print("\n2. GradientTape on a 3-D convolution (eager) raises in TensorFlow's gradient function")
x3, w3 = tf.constant(np.random.rand(1, 3, 3, 3, 2)), tf.constant(np.random.rand(2, 2, 2, 2, 3))


def grads(x, w):
    with tf.GradientTape() as tape:
        tape.watch(x)
        tape.watch(w)
        y = tf.nn.convolution(x, w, padding="VALID")
    return tape.gradient(y, [x, w], output_gradients=tf.ones_like(y))


_, err = attempt(lambda: grads(x3, w3))
print(f"   eager: {err or 'works'}")
got, err = attempt(lambda: tf.function(grads, autograph=False)(x3, w3))
print(f"   the same in tf.function: {err or 'works'}")

print("\n3. Refused on the CPU (the adapter works around each, see adapters/tensorflow_nn.py)")
x2 = np.random.rand(1, 9, 9, 4).astype(np.float32)
_, err = attempt(lambda: tf.nn.convolution(x2, np.ones((3, 3, 4, 6), np.float32), strides=2,
                                           dilations=2, padding="VALID"))
print(f"   stride 2 with dilation 2: {err}")
_, err = attempt(lambda: tf.nn.convolution(np.ones((1, 5, 5, 5, 4), np.float32),
                                           np.ones((2, 2, 2, 2, 6), np.float32), padding="VALID"))
print(f"   3-D with groups 2: {err}")
for dt in (np.float32, np.float64):
    xg = tf.constant(np.ones((1, 5, 5, 2), dt))
    wg = tf.constant(np.ones((1, 1, 1, 2), dt))
    _, err = attempt(lambda: grads(xg, wg))
    print(f"   {np.dtype(dt).name} gradient of a 2-D convolution with groups 2: {err or 'works'}")
for dt in (np.float32, np.float64):
    _, err = attempt(lambda: tf.nn.conv_transpose(np.ones((1, 4, 4, 3), dt),
                                                  np.ones((3, 3, 5, 3), dt),
                                                  output_shape=[1, 8, 8, 5], strides=1,
                                                  padding="VALID", dilations=2))
    print(f"   {np.dtype(dt).name} transposed with dilation 2: {err or 'works'}")

print("\n4. Accumulation formats (channels or positions 2^e, 1, -2^e sum to 1 exactly while "
      "partial sums keep e + 1 bits)")


def lost(kind, dt):
    for e in range(1, 40):
        with np.errstate(over="ignore"):
            if not np.isfinite(np.float64(2.0 ** e).astype(dt.as_numpy_dtype)):
                return f"≥ {e} bits (2^{e} overflows {dt.name})"
        v = np.zeros(64)
        v[0], v[1], v[-1] = 2.0 ** e, 1.0, -(2.0 ** e)
        if kind == "forward":
            y = tf.nn.convolution(tf.constant(v.reshape(1, 1, 64), dt), tf.ones([1, 64, 1], dt),
                                  padding="VALID")
        elif kind == "grad_weight":
            x, w = tf.constant(v.reshape(1, 64, 1), dt), tf.ones([1, 1, 1], dt)
            with tf.GradientTape() as tape:
                tape.watch(w)
                out = tf.nn.convolution(x, w, padding="VALID")
            y = tape.gradient(out, w, output_gradients=tf.ones_like(out))
        elif kind == "grad_bias":
            g = tf.constant(v.reshape(1, 64, 1), dt)
            b = tf.zeros([1], dt)
            with tf.GradientTape() as tape:
                tape.watch(b)
                out = tf.nn.bias_add(tf.zeros_like(g), b)
            y = tape.gradient(out, b, output_gradients=g)
        else:   # transposed: the channels of x summed into one output
            y = tf.nn.conv_transpose(tf.constant(v.reshape(1, 1, 64), dt), tf.ones([1, 1, 64], dt),
                                     output_shape=[1, 1, 1], strides=1, padding="VALID")
        if float(np.asarray(y, dtype=np.float64).ravel()[0]) != 1.0:
            return f"{e} bits (2^{e} + 1 was rounded)"
    return "≥ 40 bits"


for dt in (tf.float16, tf.bfloat16, tf.float32):
    row = ", ".join(f"{k} {lost(k, dt)}" for k in ("forward", "transposed", "grad_weight", "grad_bias"))
    print(f"   {dt.name}: {row}")
for nd in (1, 2, 3):            # the forward sums by number of spatial axes
    row = []
    for dt in (tf.float16, tf.bfloat16):
        for e in range(1, 30):
            with np.errstate(over="ignore"):
                if not np.isfinite(np.float64(2.0 ** e).astype(dt.as_numpy_dtype)):
                    row.append(f"{dt.name} ≥ {e} bits")
                    break
            v = np.zeros(64)
            v[0], v[1], v[-1] = 2.0 ** e, 1.0, -(2.0 ** e)
            y = tf.nn.convolution(tf.constant(v.reshape(1, *[1] * nd, 64), dt),
                                  tf.ones([*[1] * nd, 64, 1], dt), padding="VALID")
            if float(np.asarray(y, dtype=np.float64).ravel()[0]) != 1.0:
                row.append(f"{dt.name} {e} bits")
                break
    print(f"   {nd}-D forward partial sums: {', '.join(row)}")
ones = tf.ones([1, 4096, 1], tf.bfloat16)
b = tf.zeros([1], tf.bfloat16)
with tf.GradientTape() as tape:
    tape.watch(b)
    out = tf.nn.bias_add(ones, b)
print(f"   bfloat16 bias gradient of 4096 ones: {float(tape.gradient(out, b, output_gradients=ones)[0])} "
      "(exact: 4096)")

print("\n5. float64 subnormal inputs are flushed to zero")
tiny = 2.0 ** -1070
y = tf.nn.convolution(tf.constant([[[tiny]]], tf.float64), tf.constant([[[1.0]]], tf.float64),
                      padding="VALID")
print(f"   x = 2^-1070, w = 1: expected {tiny!r}; got {float(y.numpy().ravel()[0])!r}")
