"""Reading a learned correction: against its targets, by input, as equations, and as a vector field."""

from .reading import CorrectionReading, read_correction
from .report import reading_markdown, write_reading
from .run import explain_run
from .surrogate import PolynomialLibrary, SparseFit, fit_sparse, stlsq
from .vector_field import equivalent_vector_field

__all__ = ["CorrectionReading", "read_correction", "write_reading", "reading_markdown", "explain_run",
           "PolynomialLibrary", "SparseFit", "fit_sparse", "stlsq", "equivalent_vector_field"]
