"""ONNX models (PyTorch's ``torch.onnx`` export, and others) in ONNX Runtime on the CPU.

A float graph and an int8 graph in QDQ form (QuantizeLinear / DequantizeLinear pairs around
the integer operators, float input and output: what ONNX Runtime's static quantisation
writes) load alike; a dynamic batch axis is accepted. The model must have one input and one
output; their shapes are checked against the card as for any other runner, and their names
against the card's ``[model]`` names when it gives them. One window at a time, batch 1, as
every runner: a window's numbers never depend on how many arrived with it. ONNX Runtime is
an optional dependency (``pip install onnxruntime``), imported only here.

References
----------
ONNX Runtime, "Quantize ONNX models" (the QDQ format); the ONNX operator specifications of
QuantizeLinear and DequantizeLinear (onnx.ai).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

from monitor.base.errors import ModelError
from monitor.features.card import ModelCard
from monitor.inference.base import RunnerBase


def is_qdq(path: Path) -> bool:
    """True when the graph holds DequantizeLinear nodes (an int8 graph in QDQ form).

    The operator names are plain strings in the model's protobuf, so the bytes tell without
    parsing the graph.

    Parameters
    ----------
    path : Path
        The ``.onnx`` file.

    Returns
    -------
    bool
        True for a quantised graph.
    """
    return b"DequantizeLinear" in Path(path).read_bytes()


class OnnxRunner(RunnerBase):
    """An ``.onnx`` model in ONNX Runtime's CPU execution provider.

    Parameters
    ----------
    path : Path
        The model file.
    card : ModelCard
        The card the model must fit (input shape, output size and kind, tensor names).
    threads : int
        ONNX Runtime's threads inside an operator.

    Raises
    ------
    ModelError
        ONNX Runtime is not installed, the file does not load, its input is not float32, or
        the model does not fit its card.
    """

    def __init__(self, path: Path, card: ModelCard, *, threads: int = 1) -> None:
        try:
            import onnxruntime as ort
        except ImportError:
            raise ModelError(f"{path}: an ONNX model needs ONNX Runtime, which is not installed "
                             f"(pip install onnxruntime)") from None
        opts = ort.SessionOptions()
        opts.intra_op_num_threads = max(1, int(threads))
        opts.inter_op_num_threads = 1
        opts.execution_mode = ort.ExecutionMode.ORT_SEQUENTIAL
        opts.log_severity_level = 3  # errors only: a loaded model is not news
        try:
            sess = ort.InferenceSession(str(path), sess_options=opts,
                                        providers=["CPUExecutionProvider"])
        except Exception as exc:  # noqa: BLE001 - onnxruntime raises its own kinds
            reason = str(exc).strip().splitlines()[0][:200] if str(exc).strip() else \
                type(exc).__name__
            raise ModelError(f"{path}: cannot be loaded as an ONNX model ({reason})") from None
        ins, outs = sess.get_inputs(), sess.get_outputs()
        want_in, want_out = card.model_names
        for what, tensors, want in (("input", ins, want_in), ("output", outs, want_out)):
            if want is not None and [t.name for t in tensors] != [want]:
                raise ModelError(f"{path}: its {what} is {[t.name for t in tensors]}, the card "
                                 f"{card.name} names {want!r}")
        if ins and ins[0].type != "tensor(float)":
            raise ModelError(f"{path}: its input is {ins[0].type}; scenemon gives float32 "
                             f"features (quantise in QDQ form, with a float input)")
        in_shape = tuple(d if isinstance(d, int) and d > 0 else None
                         for d in (ins[0].shape[1:] if ins and ins[0].shape else ()))
        last = outs[0].shape[-1] if outs and outs[0].shape else None
        super().__init__(path, card, in_shape, last if isinstance(last, int) else 0,
                         len(ins), len(outs))
        self.sess = sess
        self.in_name, self.out_name = ins[0].name, outs[0].name
        self.model_kind = "onnx-int8" if is_qdq(path) else "onnx-float"
        self.runtime = "onnxruntime"
        self.check_outputs()

    def predict(self, features: np.ndarray) -> np.ndarray:
        """Probabilities ``(n, n_outputs)``, float32, for features ``(n, *card.feature_shape)``.

        One run per window at batch 1; a ``"logits"`` card's outputs go through a softmax.
        """
        feats = np.asarray(features, np.float32)
        out = np.empty((feats.shape[0], self.n_outputs), np.float32)
        run, names, key = self.sess.run, [self.out_name], self.in_name
        for i in range(feats.shape[0]):
            out[i] = run(names, {key: feats[i].reshape(self._one_shape)})[0].reshape(-1)
        return self._finish(out)
