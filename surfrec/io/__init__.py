"""Reading and writing files: one module per file kind.

* :mod:`surfrec.io.images` — frame sequences from globs, folders, multi-page TIFFs and lists;
* :mod:`surfrec.io.truthfile` — truth.h5 of a synthetic session;
* :mod:`surfrec.io.sessionfolder` — a whole synthetic session folder;
* :mod:`surfrec.io.inspection` — summaries of any surfrec file;
* :mod:`surfrec.io.outputs` — never overwrite without --force; atomic files and folders.
"""

from surfrec.io.images import FrameSequence, natural_key, open_frames, pair_frames, save_image

__all__ = ["FrameSequence", "natural_key", "open_frames", "pair_frames", "save_image"]
