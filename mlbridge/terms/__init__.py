"""Region terms: one module per term behind the contract in :mod:`mlbridge.terms.base`."""
from .base import RegionInfo, RegionTerm, TermContent, TermResult

__all__ = ["RegionInfo", "RegionTerm", "TermContent", "TermResult"]
