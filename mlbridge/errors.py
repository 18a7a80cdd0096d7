"""mlbridge's exceptions. Each subclasses a builtin so callers can catch broadly.

Every message names the bad value and says how to fix it.
"""


class MlbridgeError(Exception):
    """Base class of every error mlbridge raises on purpose."""


class LigandInputError(MlbridgeError, ValueError):
    """Raised when a ligand input (SMILES, SDF/MOL/MOL2, PDB + SMILES) cannot be used as given."""


class InputFileNotFoundError(MlbridgeError, FileNotFoundError):
    """Raised when an input file named by the user does not exist."""


class ParametrizationError(MlbridgeError, RuntimeError):
    """Raised when antechamber, sqm, parmchk2 or tleap fails; names the tool and its log."""


class PreparedSystemError(MlbridgeError, ValueError):
    """Raised when a prepared system (AMBER/GROMACS/CHARMM/OpenMM files) cannot be read or the
    region selection does not match it."""


class DomainError(MlbridgeError, ValueError):
    """Raised when a region potential is asked to handle elements or charge states outside the
    domain it was trained or parametrized for."""


class ModelUnavailableError(MlbridgeError, RuntimeError):
    """Raised when a model's parameters are not on disk; the message gives the fetch command."""


class TreatmentError(MlbridgeError, ValueError):
    """Raised for an unknown treatment or one that cannot be combined with the chosen potential."""


class SCFConvergenceError(MlbridgeError, RuntimeError):
    """Raised when the semi-empirical SCF of the region fails to converge."""


class OptionError(MlbridgeError, TypeError):
    """Raised for misspelled or unused keyword options."""
