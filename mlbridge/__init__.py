"""mlbridge: ligand-in-water OpenMM systems with a machine-learned ligand and classical water.

Public entry points: :func:`mlbridge.build.build`, :func:`mlbridge.drift.check_setup`,
:func:`mlbridge.compare.compare` and the ``mlbridge`` command line.
"""
__version__ = "0.1.0"
