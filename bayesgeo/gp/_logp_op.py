"""The skeleton shared by the two likelihood Ops (dense :class:`bayesgeo.gp.dense.GPLogpGrad`,
nearest-neighbour :class:`bayesgeo.gp.nn.NNLogpGrad`).

Both compute, in one compiled kernel call, the log-likelihood and its whole gradient:
outputs ``(logp, d/d resid, d/d scale, d/d partial_sill, d/d nugget)``. Their inputs are the
residual vector first, constants of the model (distances, coordinates, neighbour sets, a trend
covariance) at the positions :meth:`LogpGradOp.constant_inputs` names, and the three scalar
parameters (scale, partial sill, nugget) in that order. The gradient graph only scales the stored
gradient by the incoming cotangent; second derivatives are not implemented.
"""

from __future__ import annotations

import hashlib
import inspect

import numpy as np
import pytensor.tensor as pt
from pytensor.gradient import DisconnectedType, disconnected_type, grad_not_implemented
from pytensor.graph.basic import Apply
from pytensor.graph.op import Op

__all__ = ["LogpGradOp", "source_version"]


def source_version(*modules) -> int:
    """A number that changes whenever the source of ``modules`` changes: the cache key of the Numba
    implementations registered for the Ops (a stale compiled kernel is never reused)."""
    digest = hashlib.sha256(b"".join(inspect.getsource(m).encode() for m in modules)).hexdigest()
    return int(digest[:12], 16)


class LogpGradOp(Op):
    """Base of an Op whose outputs are a log-likelihood and its gradient (module docstring).

    ``n_params`` scalar parameters follow the constants (three: scale, partial sill, nugget; five with
    the two anisotropy coordinates of :mod:`bayesgeo.gp.anisotropy`), each with its gradient output.
    """

    n_params: int = 3

    def constant_inputs(self, n_inputs: int) -> tuple[int, ...]:
        """Positions of the inputs that are constants of the model (no gradient flows to them)."""
        raise NotImplementedError

    def kernel(self, inputs) -> tuple:
        """``(logp, d resid, d scale, d partial_sill, d nugget)`` from NumPy inputs."""
        raise NotImplementedError

    def apply(self, inputs: list) -> Apply:
        """The Apply node of ``inputs`` (tensors) with the five outputs."""
        outs = [pt.dscalar(), pt.dvector(), *(pt.dscalar() for _ in range(self.n_params))]
        return Apply(self, inputs, outs)

    def perform(self, node, inputs, outputs):
        for out, val in zip(outputs, self.kernel(inputs)):
            out[0] = np.asarray(val, dtype="float64")

    def infer_shape(self, node, shapes):
        return [(), shapes[0], *(() for _ in range(self.n_params))]

    def connection_pattern(self, node):
        constant = self.constant_inputs(len(node.inputs))
        return [[i not in constant] * (2 + self.n_params) for i in range(len(node.inputs))]

    def pullback(self, inputs, outputs, cotangents):
        constant = self.constant_inputs(len(inputs))
        if any(not isinstance(c.type, DisconnectedType) for c in cotangents[1:]):
            # second derivatives (Hessians) are not implemented
            return [disconnected_type() if i in constant else grad_not_implemented(self, i, x)
                    for i, x in enumerate(inputs)]
        g = cotangents[0]
        params = iter(outputs[2:])  # d scale, d partial_sill, d nugget (and anisotropy), in input order
        return [disconnected_type() if i in constant else g * (outputs[1] if i == 0 else next(params))
                for i in range(len(inputs))]
