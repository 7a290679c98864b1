"""Morphologies: SWC reading and writing, soma rules, repairs, the sample tree and
synthetic demo cells."""

from __future__ import annotations

from . import synthetic
from .graph import branch_order, branch_points, terminals, to_graph
from .repair import Repairs
from .samples import APICAL, AXON, BASAL, SOMA, SWC_TYPE_NAMES, Morphology
from .summary import MorphologySummary, format_summary, summarize
from .swc import SwcWarning, format_swc, parse_swc_text, read_swc, write_swc
from .tree import Branch, branches, path_distance_um

__all__ = [
    "Morphology",
    "SOMA",
    "AXON",
    "BASAL",
    "APICAL",
    "SWC_TYPE_NAMES",
    "read_swc",
    "write_swc",
    "parse_swc_text",
    "format_swc",
    "SwcWarning",
    "Repairs",
    "summarize",
    "format_summary",
    "MorphologySummary",
    "to_graph",
    "branch_points",
    "terminals",
    "branch_order",
    "Branch",
    "branches",
    "path_distance_um",
    "synthetic",
]
