"""Call a CasADi function through preallocated numpy buffers.

Converting numpy arrays to CasADi matrices and back through the Python bindings costs about a
millisecond per IPOPT call at our problem sizes — as much as the IPOPT iterations. CasADi's
buffer interface lets the function read and write numpy memory directly.
"""

import numpy as np


class BufferedFunction:
    """Wraps a casadi.Function; inputs and outputs are flat float64 numpy arrays (column-major)."""

    def __init__(self, function):
        self.function = function
        self._buffer, self._evaluate = function.buffer()
        self.inputs = {}
        self.outputs = {}
        for i, name in enumerate(function.name_in()):
            array = np.zeros(function.numel_in(i))
            self.inputs[name] = array
            self._buffer.set_arg(i, memoryview(array))
        for i, name in enumerate(function.name_out()):
            array = np.zeros(function.numel_out(i))
            self.outputs[name] = array
            self._buffer.set_res(i, memoryview(array))

    def __call__(self, **inputs):
        """Copy `inputs` into the buffers (unnamed inputs are zero), evaluate, return the output arrays.

        The returned arrays are reused by the next call: copy what you keep.
        """
        for name, array in self.inputs.items():
            if name in inputs:
                array[:] = np.ravel(inputs[name], order="F")
            else:
                array.fill(0.0)
        self._evaluate()
        return self.outputs

    def stats(self):
        return self._buffer.stats()
