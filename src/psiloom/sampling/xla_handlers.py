"""Numba kernels as XLA foreign-function handlers (CPU): the plumbing between a call frame and arrays.

A compiled program that calls the host through :func:`jax.pure_callback` cannot be kept in JAX's
persistent compilation cache (the callback is a Python object of the running process), so every
new process compiled the whole training step again: seconds of a short run. A *foreign-function
handler* is instead looked up by name when the program runs, so a program that calls one is
cached like any other. This module turns a Numba-compiled function into such a handler.

XLA calls a handler with one argument, a pointer to its *call frame*, a C struct of the XLA FFI
C API (``xla/ffi/api/c_api.h``) whose layout this module reads (64-bit words; the layout checked
by ``tests/test_compiled_sweep.py`` against the running jaxlib, which refuses a handler of an
unsupported API version at registration):

* the frame: ``struct_size, extension_start, api, ctx, stage, args{struct_size, extension_start,
  size, types, args}, rets{...}, attrs{...}``: the arguments at words 5-9, the results at 10-14;
* an argument or result buffer: ``struct_size, extension_start, dtype, data, rank, dims``: the
  data pointer is word 3;
* at registration XLA calls the handler once with a *metadata* extension (type 1) in
  ``extension_start`` and reads the API version the handler was written for from it: this module
  answers (0, 1), the oldest version the framework accepts, whose frame layout is the one above;
* a failure is reported by returning an error made by the API's ``XLA_FFI_Error_Create`` (word 6
  of the API struct; its arguments ``struct_size, extension_start, message, code``), which JAX
  raises in the caller with the message; success returns a null pointer.

The handler itself (a :func:`numba.cfunc` of signature ``int64(int64*)``) is written by the
caller with :func:`buffer_address`, ``pointer`` (a Numba intrinsic), :func:`answer_metadata` and :func:`error`; :func:`register` hands it
to XLA under a name, once per process.
"""

# mypy: disable-error-code="call-arg"
# (Numba intrinsics are typed with their typing context as the first parameter, which callers never pass)
from __future__ import annotations

import ctypes

import jax

try:
    import numba
    from numba import types
    from numba.extending import intrinsic
except ImportError:  # pragma: no cover - without Numba nothing here is used (compiled.available())
    numba = None  # type: ignore[assignment]

METADATA_EXTENSION = 1  #: ``XLA_FFI_Extension_Type`` of the registration-time metadata query
API_VERSION = (0, 1)  #: the FFI API version (major, minor) the handlers answer, whose call-frame layout is read here
INVALID_ARGUMENT = 3  #: ``XLA_FFI_Error_Code`` reported for a refused call
_ARGS_WORD, _RETS_WORD = 5, 10  # first word of the frame's argument / result structs
_ERROR_CREATE_WORD = 6  # word of XLA_FFI_Error_Create in the API struct

if numba is not None:
    @intrinsic
    def pointer(typingctx, address, like):
        """``like.dtype*`` at the integer ``address`` (for :func:`numba.carray`)."""
        target = types.CPointer(like.dtype)
        sig = target(address, like)

        def codegen(context, builder, signature, args):
            return builder.inttoptr(args[0], context.get_value_type(target))
        return sig, codegen

    @intrinsic
    def _call_error_create(typingctx, function, arguments):
        """``(XLA_FFI_Error*) function(arguments)`` for integer addresses; returns the address."""
        sig = types.int64(types.int64, types.int64)

        def codegen(context, builder, signature, args):
            from llvmlite import ir
            void_p = ir.IntType(8).as_pointer()
            fn = builder.inttoptr(args[0], ir.FunctionType(void_p, [void_p]).as_pointer())
            result = builder.call(fn, [builder.inttoptr(args[1], void_p)])
            return builder.ptrtoint(result, ir.IntType(64))
        return sig, codegen

    import numpy as np
    from numba import carray

    _WORD = np.zeros(1, np.int64)
    _INT32 = np.zeros(1, np.int32)

    @numba.njit(cache=True, nogil=True)
    def answer_metadata(frame) -> bool:
        """If this call is XLA's registration-time metadata query, answer it and return True."""
        extension = frame[1]
        if extension == 0:
            return False
        ext = carray(pointer(extension, _WORD), (4,))
        if ext[1] & 0xFFFFFFFF != METADATA_EXTENSION:
            return False
        metadata = carray(pointer(ext[3], _INT32), (9,))  # struct_size, api_version{size, ext, major, minor}, traits
        metadata[6] = API_VERSION[0]
        metadata[7] = API_VERSION[1]
        metadata[8] = 0  # no traits (the handler is not command-buffer compatible)
        return True

    @numba.njit(cache=True, nogil=True)
    def buffer_address(frame, index, result) -> int:
        """Data address of argument ``index`` (``result`` False) or result ``index`` (True)."""
        word = _RETS_WORD if result else _ARGS_WORD
        table = carray(pointer(frame[word + 4], _WORD), (index + 1,))
        return carray(pointer(table[index], _WORD), (4,))[3]

    @numba.njit(cache=True, nogil=True)
    def error(frame, message_address) -> int:
        """An XLA FFI error (address) with the NUL-terminated message at ``message_address``."""
        api = carray(pointer(frame[2], _WORD), (_ERROR_CREATE_WORD + 1,))
        arguments = np.zeros(4, np.int64)  # struct_size, extension_start, message, code
        arguments[0] = 28
        arguments[2] = message_address
        arguments[3] = INVALID_ARGUMENT
        return _call_error_create(api[_ERROR_CREATE_WORD], arguments.ctypes.data)


_REGISTERED: set[str] = set()


def register(name: str, handler) -> None:
    """Hand the Numba ``cfunc`` ``handler`` to XLA's CPU platform as foreign function ``name``
    (once per process; later calls with the same name do nothing)."""
    if name in _REGISTERED:
        return
    new_capsule = ctypes.pythonapi.PyCapsule_New
    new_capsule.restype = ctypes.py_object
    new_capsule.argtypes = (ctypes.c_void_p, ctypes.c_char_p, ctypes.c_void_p)
    capsule = new_capsule(handler.address, b"xla._CUSTOM_CALL_TARGET", None)
    jax.ffi.register_ffi_target(name, capsule, platform="cpu", api_version=1)
    _REGISTERED.add(name)
