"""Export a fitted hybrid model as a frozen simulator, and check what may be exported.

The export is a short sequence of named steps (:mod:`mnemode.export.exporter`):
check the request, freeze the model, capture the programs
(:mod:`~mnemode.export.programs`), check their parity with the eager model
(:mod:`~mnemode.export.parity`), add optional ONNX copies
(:mod:`~mnemode.export.onnx`), build the manifest (:mod:`~mnemode.export.manifest`)
and write it all, signed when a key is given. Loading is :mod:`mnemode.simulator`.
"""

from ..simulator import EnvelopeError, EnvelopeWarning, Simulator, load_simulator
from .checks import DEFAULT_ENVELOPE_MARGIN
from .exporter import ParityError, export_simulator
from .manifest import CAUTIONS
from .programs import Program
from .run_checks import check_exportable

__all__ = ["export_simulator", "check_exportable", "ParityError", "CAUTIONS", "DEFAULT_ENVELOPE_MARGIN",
           "Program", "load_simulator", "Simulator", "EnvelopeWarning", "EnvelopeError"]
