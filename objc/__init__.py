"""objc: compile a training objective written in a short text spec into a checked solver.

The public surface:

    from objc import check_text, check_file, SpecError
    checked = check_text(open("spec.objc").read(), "spec.objc")
    checked.verdict, checked.accepted, checked.terms, checked.warnings, checked.expanded
"""

from objc.diagnostics import Diagnostic, SpecError
from objc.frontend import check_file, check_text

__version__ = "0.1.0"
__all__ = ["check_text", "check_file", "SpecError", "Diagnostic", "__version__"]
