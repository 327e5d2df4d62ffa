"""Pieces of the command line (``python -m basinview``): inputs and options."""

from .inputs import CommandError, floats, load_data, load_function, load_params, span_option
from .options import DEMO_OPTIONS, REPORT_OPTIONS, build_parser, plane_from_options

__all__ = [
    "DEMO_OPTIONS",
    "REPORT_OPTIONS",
    "CommandError",
    "build_parser",
    "floats",
    "load_data",
    "load_function",
    "load_params",
    "plane_from_options",
    "span_option",
]
