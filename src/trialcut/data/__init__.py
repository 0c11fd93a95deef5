"""The data layer: read a data cut, check it against the plan, derive the analysis data.

Public entry points: :func:`read_cut`, :func:`prepare_cut`, :class:`DataCut`,
:class:`AnalysisData`, :func:`write_dataset_json`; the demo simulator is
:mod:`trialcut.data.simulate`.
"""
from trialcut.data.conformance import Check, ConformanceReport
from trialcut.data.prepare import AnalysisData, DataCut, prepare_cut
from trialcut.data.readers import RawCut, raw_from_frame, read_cut, write_dataset_json

__all__ = ["AnalysisData", "Check", "ConformanceReport", "DataCut", "RawCut", "prepare_cut",
           "raw_from_frame", "read_cut", "write_dataset_json"]
