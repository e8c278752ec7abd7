"""The public surface of the package (the names users import)."""

import subprocess
import sys

import modemap

EXPECTED = {
    "AffineLocalModel", "DataError", "Dataset", "Equilibrium", "ExpressionError", "FitCancelled",
    "FitError", "Gap", "Guard", "HybridIdentifier", "HybridModel", "LocalDynamics", "LocalModel",
    "ModelFileError", "ModemapError", "ParameterError", "RegimeFinder", "RegimeModel", "Run",
    "SimulationError", "SimulationResult", "SparseLocalModel", "SwitchingSurfaces", "TermLibrary",
    "__version__", "load_model", "read_data", "save_model", "simulate", "split_holdout",
    "summarize", "validate",
}  # fmt: skip


def test_public_names_are_the_intended_ones() -> None:
    assert set(modemap.__all__) == EXPECTED
    for name in modemap.__all__:
        assert hasattr(modemap, name), name


def test_library_imports_without_the_dashboard_toolkit() -> None:
    # The library never imports the terminal toolkit: block it and import the whole pipeline.
    code = (
        "import sys; sys.modules['textual'] = None\n"
        "import modemap, modemap.identify.identifier, modemap.report.markdown\n"
        "import modemap.report.output, modemap.app.cli\n"
        "assert 'textual' not in [m for m in sys.modules if sys.modules[m] is not None]\n"
    )
    subprocess.run([sys.executable, "-c", code], check=True)


def test_every_user_error_is_a_modemap_error() -> None:
    for cls in (modemap.DataError, modemap.ExpressionError, modemap.ModelFileError,
                modemap.FitError, modemap.FitCancelled, modemap.SimulationError,
                modemap.ParameterError):  # fmt: skip
        assert issubclass(cls, modemap.ModemapError)
