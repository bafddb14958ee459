"""takescribe: turn an instrument take into a draft score and compare it with the part.

Data flow (one subpackage per stage; each imports only from stages before it):

audio → features → reference → alignment → transcription (notes) →
notation · export · evaluation · comparison → report → jobs → cli
"""

from .errors import TakescribeError
from .notes import Note

__version__ = "0.1.0"

__all__ = ["Note", "TakescribeError", "__version__"]
