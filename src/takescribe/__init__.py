"""takescribe: turn an instrument take into a draft score and compare it with the part.

Data flow (one module per stage; each imports only from stages before it):

audio → spectrogram → instruments/dictionary → nmf → tracking (notes) →
noteio/midi/notation (export) · score/align (reference) · evaluate · compare/report →
pipeline → cli
"""

from .errors import TakescribeError
from .notes import Note

__version__ = "0.1.0"

__all__ = ["Note", "TakescribeError", "__version__"]
