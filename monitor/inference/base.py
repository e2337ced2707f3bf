"""The runner contract: the `Runner` protocol and what every runner shares.

`Runner` is what the engine and the tools need of a loaded model; `RunnerBase` checks a
model's inputs and outputs against its card, keeps the batch-1 input shape and the file's
sha256, turns the output into probabilities and warns once when a "probabilities" model
does not give them. `softmax` and `file_sha256` (from ``monitor.base.files``) are here so
that every runner (LiteRT, Keras, the microcontroller interpreter) takes them from one
place. The registry that picks a runner for a file is ``monitor.inference.registry``.
"""

from __future__ import annotations

import warnings
from pathlib import Path
from typing import Protocol

import numpy as np

from monitor.base.errors import ModelError
from monitor.base.files import file_sha256
from monitor.features.card import ModelCard


class Runner(Protocol):
    """What the engine and the tools need of a loaded model."""

    # session.json's model kind: "keras", "tflite-float", "tflite-int8", "onnx-float", "onnx-int8"
    model_kind: str
    runtime: str  # "tensorflow" | "litert" | "micro" | "onnxruntime"
    path: Path
    sha256: str
    input_shape: tuple[int, ...]
    n_outputs: int

    def predict(self, features: np.ndarray) -> np.ndarray:
        """Probabilities, shape ``(n, n_outputs)`` float32, for features ``(n, *card.feature_shape)``."""
        ...


class TensorRunner(Runner, Protocol):
    """A runner of a ``.tflite`` model (LiteRT or the microcontroller interpreter): it also
    gives one window's raw input and output tensors (int8 for an int8 model)."""

    def raw(self, feature: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """The quantised input and the raw output tensor of one window, flat."""
        ...


def softmax(z: np.ndarray) -> np.ndarray:
    """Softmax over the last axis, as float32.

    The row maximum is subtracted first, so large logits do not overflow.

    Parameters
    ----------
    z : numpy.ndarray
        Logits, classes on the last axis.

    Returns
    -------
    numpy.ndarray
        Probabilities summing to 1 on the last axis, float32.
    """
    z = z - np.max(z, axis=-1, keepdims=True)
    e = np.exp(z)
    return (e / np.sum(e, axis=-1, keepdims=True)).astype(np.float32)


def sigmoid(z: np.ndarray) -> np.ndarray:
    """The logistic function of each value, as float32 (several labels, each its own
    probability).

    Computed as ``exp(min(z, 0)) / (1 + exp(-|z|))``, which neither overflows for large
    negative nor for large positive logits.

    Parameters
    ----------
    z : numpy.ndarray
        Logits.

    Returns
    -------
    numpy.ndarray
        Values from 0 to 1, float32.
    """
    z = np.asarray(z, np.float64)
    return (np.exp(np.minimum(z, 0.0)) / (1.0 + np.exp(-np.abs(z)))).astype(np.float32)


class RunnerBase:
    """What the runners share: the model checked against its card, the batch-1 input shape,
    the file's sha256, the output turned into probabilities and the warm-up check.

    Parameters
    ----------
    path : Path
        The model file.
    card : ModelCard
        The card the model must fit (input shape, output size, output kind).
    input_shape : tuple
        The model's input shape without the batch axis (None or -1 for a free size).
    n_outputs : int
        Values of its output.
    n_inputs, n_out_tensors : int
        Its input and output tensors (exactly one each is accepted).
    """


    @staticmethod
    def check_io(path: Path, card: ModelCard, input_shape: tuple, n_outputs: int,
                 n_inputs: int, n_out_tensors: int) -> bool:
        """Refuse a model whose inputs and outputs do not fit the card (see
        `ModelCard.check_model`); True when it wants a trailing channel axis."""
        if n_inputs != 1 or n_out_tensors != 1:
            raise ModelError(f"{path}: model has {n_inputs} inputs and {n_out_tensors} "
                             f"outputs; scenemon needs exactly one of each")
        return card.check_model(tuple(None if s in (None, -1) else int(s) for s in input_shape),
                                int(n_outputs), path)

    def __init__(self, path: Path, card: ModelCard, input_shape: tuple, n_outputs: int,
                 n_inputs: int, n_out_tensors: int) -> None:
        self.path = path
        self.card = card
        self.check_io(path, card, input_shape, n_outputs, n_inputs, n_out_tensors)
        self.input_shape = tuple(int(s) if s is not None else -1 for s in input_shape)
        self.n_outputs = int(n_outputs)
        self._one_shape = (1, *card.model_input_shape(input_shape))
        self.sha256 = file_sha256(path)

    def _finish(self, out: np.ndarray) -> np.ndarray:
        if self.card.output == "logits":
            return softmax(out)
        if self.card.output == "sigmoid_logits":
            return sigmoid(out)
        return out.astype(np.float32)

    def check_outputs(self) -> None:
        """Warm up once, and refuse a "probabilities" model whose outputs are not probabilities.

        A softmax output is never negative and sums to 1; a model that ends in logits gives
        negative values or another sum, and deciding on those would be wrong without a word.

        Raises
        ------
        ModelError
            A "probabilities" model gave a negative value or a sum more than 0.05 from 1 on
            a silent window, or a "sigmoid" model a value outside 0 to 1: the sentence names
            the card key to set (``output = "logits"`` or ``"sigmoid_logits"``).
        """
        out = self.predict(np.zeros((1, *self.card.feature_shape), np.float32))
        if self.card.output not in ("probabilities", "sigmoid"):
            return
        if not np.all(np.isfinite(out)):
            warnings.warn(f"{self.path}: a silent window gives a non-finite output; such "
                          f"windows are recorded as model faults", stacklevel=2)
            return
        low, high = float(out.min()), float(out.max())
        if self.card.output == "sigmoid":  # several labels: each from 0 to 1, any sum
            if low < -1e-3 or high > 1.0 + 1e-3:
                raise ModelError(f"{self.path}: its outputs are not probabilities (on a silent "
                                 f"window they run from {low:.3f} to {high:.3f}); if the "
                                 f"model ends without its sigmoid, set output = "
                                 f"\"sigmoid_logits\" in its card {self.card.name}")
            return
        s = float(out.sum())
        if low < -1e-3 or abs(s - 1.0) > 0.05:
            raise ModelError(f"{self.path}: its outputs are not probabilities (on a silent "
                             f"window they sum to {s:.3f}, the smallest is {low:.3f}); if the "
                             f"model ends without a softmax, set output = \"logits\" in its "
                             f"card {self.card.name}")
