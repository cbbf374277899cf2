"""swapper: replace costly activations in ONNX models with cheap, calibrated surrogates.

    import swapper
    found = swapper.scan("model.onnx")                       # where are the activations?
    result = swapper.swap("model.onnx", calib="calib.npz")   # plan, calibrate, rewrite
    relu = swapper.swap("model.onnx", calib="calib.npz", options=swapper.SwapOptions(to="relu"))
    verdict = swapper.check(result.loaded.model, result.candidate,
                            swapper.load_data("val.npz", result.loaded)).verdict
"""
__version__ = "0.1.0"

__all__ = ["__version__", "scan", "swap", "sweep", "check", "load_data", "ScanResult", "SwapResult", "CheckResult",
           "SwapperError", "SwapOptions"]


def __getattr__(name):
    # Imported lazily so `import swapper.functions` stays light (no onnxruntime session code).
    if name == "SwapperError":
        from swapper.errors import SwapperError

        return SwapperError
    if name == "SwapOptions":
        from swapper.options import SwapOptions

        return SwapOptions
    if name in __all__:
        from swapper import api

        return getattr(api, name)
    raise AttributeError(f"module 'swapper' has no attribute {name!r}")
