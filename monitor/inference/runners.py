"""Model runners: one `predict(features) -> probabilities` for Keras and TFLite models.

``monitor.inference.registry.load_runner(path, card)`` picks the runner by extension:

- ``.keras`` (Keras 3) and legacy ``.h5``: loaded with ``safe_mode=True`` (a model with a
  Lambda layer is refused unless ``trust_model``), called through one `tf.function` with a
  fixed input signature, never ``model.predict`` per window (about 90 ms a call against
  about 1 ms).
- ``.tflite`` (float or int8): LiteRT's interpreter, which does not import TensorFlow
  (about 0.2 s to import against about 6 s). Int8 inputs are quantised with the tensor's
  own scale and zero point, int8 outputs dequantised.

Both runners evaluate one window per call of a fixed batch-1 signature, so a window's
result never depends on how many windows arrived with it: fast replay and real-time replay
give identical numbers. A runner is owned by one thread (the engine's compute thread).
"""

from __future__ import annotations

import contextlib
import os
from pathlib import Path

import numpy as np

from monitor.base.errors import ModelError
from monitor.base.native import quiet_native_stderr as _quiet_native_stderr
from monitor.features.card import ModelCard
from monitor.inference.base import RunnerBase, softmax  # noqa: F401 - softmax for callers

MIN_KERAS = (3, 12)


class KerasRunner(RunnerBase):
    """A Keras 3 model behind a batch-1 `tf.function` (see module docstring).

    Parameters
    ----------
    path : Path
        The model file.
    card : ModelCard
        The card the model must fit (input shape, output size, output kind).
    trust_model : bool
        Allow Lambda layers (their code runs when the model loads).
    threads : int
        TensorFlow's compute threads.

    Raises
    ------
    ModelError
        Keras too old, the file cannot be loaded (a Lambda layer without `trust_model`, an
        unknown layer), or the model does not fit its card.
    """

    def __init__(self, path: Path, card: ModelCard, *, trust_model: bool = False,
                 threads: int = 1) -> None:
        os.environ.setdefault("TF_CPP_MIN_LOG_LEVEL", "2")
        os.environ.setdefault("KERAS_BACKEND", "tensorflow")
        from monitor.base import native

        # TensorFlow's C++ start-up writes straight to fd 2 before its log level applies
        # (absl's "before InitializeLog" notice, oneDNN's): kept off the terminal unless --debug
        def quiet():
            return contextlib.nullcontext() if native.DEBUG else _quiet_native_stderr()

        with quiet():
            import tensorflow as tf
        try:  # thread counts only take before TensorFlow's first operation
            tf.config.threading.set_intra_op_parallelism_threads(threads)
            tf.config.threading.set_inter_op_parallelism_threads(1)
        except RuntimeError:
            pass
        with quiet():
            tf.constant(0.0) + 1.0  # the first operation prints its own notice
        import keras

        version = tuple(int(p) for p in keras.__version__.split(".")[:2])
        if version < MIN_KERAS:
            raise ModelError(f"{path}: keras {keras.__version__} is too old; scenemon needs "
                             f">= 3.12 (safe mode covers .h5 files only from 3.12)")
        try:
            with quiet():
                model = keras.saving.load_model(path, compile=False, safe_mode=not trust_model)
        except Exception as exc:  # keras raises many kinds for a bad file
            text = str(exc)
            first = text.strip().splitlines()[0] if text.strip() else type(exc).__name__
            if not trust_model and ("Lambda" in text or "safe_mode" in text):
                raise ModelError(f"{path}: the model contains a Lambda layer, whose code "
                                 f"would run on loading; refused (pass --trust-model only "
                                 f"for a file you trust)") from None
            if trust_model and "Lambda" in text:
                raise ModelError(f"{path}: --trust-model was given, but its Lambda layer's "
                                 f"function cannot be restored from the file (it was saved "
                                 f"by name, not as code: {first[:160]})") from None
            if "Unknown layer" in text or "custom" in text.lower() or "registered" in text:
                # the whole reason (Keras names the layer), then what to do about it
                raise ModelError(f"{path}: cannot be loaded as a Keras model: "
                                 f"{' '.join(text.split())} -- it uses a layer Keras does not "
                                 f"know here: the code that registers it "
                                 f"(keras.saving.register_keras_serializable) is not imported "
                                 f"in this process. Convert the model to .tflite where that "
                                 f"code runs (scenemon quantize, or TFLiteConverter), or save "
                                 f"it with built-in layers only") from None
            raise ModelError(f"{path}: cannot be loaded as a Keras model ({first})") from None
        inputs = model.inputs if isinstance(model.inputs, list) else [model.inputs]
        outputs = model.outputs if isinstance(model.outputs, list) else [model.outputs]
        super().__init__(path, card, tuple(inputs[0].shape[1:]), outputs[0].shape[-1],
                         len(inputs), len(outputs))
        self.model_kind = "keras"
        self.runtime = "tensorflow"
        self.model = model
        self._fn = tf.function(lambda x: model(x, training=False), input_signature=[
            tf.TensorSpec(self._one_shape, tf.float32)])
        self._tf = tf
        self.check_outputs()

    def predict(self, features: np.ndarray) -> np.ndarray:
        """Probabilities ``(n, n_outputs)``, float32, for features ``(n, *card.feature_shape)``.

        One call of the batch-1 `tf.function` per window, so a window's result does not depend on
        how many came with it; a ``"logits"`` card's outputs go through a softmax.
        """
        feats = np.asarray(features, np.float32)
        out = np.empty((feats.shape[0], self.n_outputs), np.float32)
        for i in range(feats.shape[0]):
            out[i] = self._fn(feats[i].reshape(self._one_shape)).numpy()[0]
        return self._finish(out)


def _tflite_interpreter(path: Path, threads: int):
    try:
        from ai_edge_litert.interpreter import Interpreter
    except ImportError:  # no LiteRT wheel for this platform
        os.environ.setdefault("TF_CPP_MIN_LOG_LEVEL", "2")
        import tensorflow as tf

        Interpreter = tf.lite.Interpreter
    try:
        with _quiet_native_stderr():
            return Interpreter(model_path=str(path), num_threads=threads)
    except (ValueError, RuntimeError) as exc:
        first = str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__
        raise ModelError(f"{path}: cannot be loaded as a TFLite model ({first[:200]})") from None


class TFLiteRunner(RunnerBase):
    """A float or int8 `.tflite` model in LiteRT's interpreter (see module docstring).

    Parameters
    ----------
    path : Path
        The model file.
    card : ModelCard
        The card the model must fit (input shape, output size, output kind).
    threads : int
        LiteRT's compute threads.

    Raises
    ------
    ModelError
        The file cannot be loaded, its tensors cannot be read or allocated, or the model does
        not fit its card.
    """

    def __init__(self, path: Path, card: ModelCard, *, threads: int = 1) -> None:
        interp = _tflite_interpreter(path, threads)
        try:  # a damaged file can pass the loader and fail here (a tensor name not UTF-8)
            ins, outs = interp.get_input_details(), interp.get_output_details()
        except (ValueError, RuntimeError, IndexError) as exc:  # UnicodeDecodeError too
            raise ModelError(f"{path}: cannot be loaded as a TFLite model (its tensors "
                             f"cannot be read: {type(exc).__name__})") from None
        super().__init__(path, card, tuple(ins[0]["shape"][1:]) if ins else (),
                         int(outs[0]["shape"][-1]) if outs else 0, len(ins), len(outs))
        try:
            with _quiet_native_stderr():
                interp.resize_tensor_input(ins[0]["index"], list(self._one_shape))
                interp.allocate_tensors()
        except (ValueError, RuntimeError) as exc:
            raise ModelError(f"{path}: cannot allocate tensors ({exc})") from None
        self.interp = interp
        self._in, self._out = ins[0], outs[0]
        self.in_dtype, self.out_dtype = np.dtype(ins[0]["dtype"]), np.dtype(outs[0]["dtype"])
        self.in_scale, self.in_zero = (float(v) for v in ins[0]["quantization"])
        self.out_scale, self.out_zero = (float(v) for v in outs[0]["quantization"])
        self.model_kind = "tflite-int8" if self.in_dtype == np.int8 else "tflite-float"
        self.runtime = "litert"
        with _quiet_native_stderr():
            self.check_outputs()

    def quantize_input(self, x: np.ndarray) -> np.ndarray:
        """``q = clip(round(x / scale) + zero_point, -128, 127)`` for an int8 input tensor."""
        if self.in_dtype != np.int8:
            return x.astype(self.in_dtype, copy=False)  # float32 to a float model: as it is
        q = np.round(x / np.float32(self.in_scale)) + self.in_zero
        return np.clip(q, -128, 127).astype(np.int8)

    def dequantize_output(self, q: np.ndarray) -> np.ndarray:
        """``x = scale * (q - zero_point)`` for an int8 output tensor."""
        if self.out_dtype != np.int8:
            return q.astype(np.float32, copy=False)
        return (np.float32(self.out_scale) * (q.astype(np.float32) - self.out_zero))

    def raw(self, feature: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """One window's raw input and output tensors (int8 for an int8 model)."""
        q = self.quantize_input(np.asarray(feature, np.float32).reshape(self._one_shape))
        self.interp.set_tensor(self._in["index"], q)
        self.interp.invoke()
        return q.reshape(-1), self.interp.get_tensor(self._out["index"]).reshape(-1).copy()

    def predict(self, features: np.ndarray) -> np.ndarray:
        """Probabilities ``(n, n_outputs)``, float32, for features ``(n, *card.feature_shape)``.

        One ``invoke`` per window at batch 1 (int8 inputs quantised, int8 outputs dequantised with
        the tensors' own scale and zero point); a ``"logits"`` card's outputs go through a softmax.
        """
        feats = np.asarray(features, np.float32)
        out = np.empty((feats.shape[0], self.n_outputs), np.float32)
        set_tensor, invoke, get = self.interp.set_tensor, self.interp.invoke, self.interp.get_tensor
        iidx, oidx = self._in["index"], self._out["index"]
        for i in range(feats.shape[0]):
            set_tensor(iidx, self.quantize_input(feats[i].reshape(self._one_shape)))
            invoke()
            out[i] = self.dequantize_output(get(oidx))[0]
        return self._finish(out)
