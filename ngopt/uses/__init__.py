"""How the model applies each parameter, found on recorded forwards.

A parameter gets the curvature block of the operation that applies it, whatever
module makes the call: one handler module per kind of operation, each a table
``{torch function: handler}``.  A handler reads the call's arguments, runs it, and
reports a :class:`~ngopt.uses.base.UseCall` (the rows and the layer geometry) to the
recorder (``recorder.py``), or answers ``NotImplemented`` when the call is not a use
it can describe.

=====================  ==================================================================
``linear.py``          ``F.linear``, ``addmm``, ``matmul``/``mm``/``@``, two-operand ``einsum``
``convolution.py``     ``F.conv1d``, ``F.conv2d``
``embedding.py``       ``F.embedding``
``normalization.py``   ``F.layer_norm``, ``F.rms_norm``, ``F.batch_norm``, ``F.group_norm``,
                       ``F.instance_norm``
``elementwise.py``     a parameter multiplied with (scale) or added to (shift) a tensor
``attention.py``       ``F.multi_head_attention_forward`` (``nn.MultiheadAttention``)
=====================  ==================================================================
"""
from . import attention, convolution, elementwise, embedding, linear, normalization
from .base import UseCall
from .recorder import UseRecorder, run_eagerly
from .views import ParamView

HANDLERS = {}
for _module in (linear, convolution, embedding, normalization, elementwise, attention):
    HANDLERS.update(_module.HANDLERS)

__all__ = ["HANDLERS", "ParamView", "UseCall", "UseRecorder", "run_eagerly"]
