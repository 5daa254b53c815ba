"""meshcheck: audit a fluid-domain mesh for frequency-domain (Helmholtz) acoustics.

Reads a volume mesh, checks validity and quality, applies the 1D Helmholtz
discrete-dispersion model edge by edge and frequency by frequency, and writes
an audit report: signed-off upper frequency, orders, refine/coarsen regions,
target sizes and unknown counts.

    >>> from meshcheck import AuditSettings, audit_file
    >>> res = audit_file("cabin.msh", AuditSettings(frequencies=(2000.0,)), units="mm")
    >>> res.signed_off
"""
__version__ = "0.1.0"

from .errors import MeshcheckError, MeshReadError, SettingsError, UnitsError  # noqa: E402

__all__ = ["__version__", "MeshcheckError", "MeshReadError", "SettingsError", "UnitsError",
           "AuditSettings", "AuditResult", "AdviceSettings", "audit", "audit_file", "read_mesh"]


def __getattr__(name):  # lazy: keep `import meshcheck` light for the CLI's --help
    if name in ("AuditSettings", "AuditResult", "audit", "audit_file"):
        from . import pipeline
        return getattr(pipeline, name)
    if name == "AdviceSettings":
        from .advice import AdviceSettings
        return AdviceSettings
    if name == "read_mesh":
        from .reading import read_mesh
        return read_mesh
    raise AttributeError(name)
