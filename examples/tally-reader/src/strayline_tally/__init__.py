"""Example strayline reader plug-in: 'tally' text files, one per scan line."""

from strayline_tally.reader import TALLY_READER, TallyReader, read_tally
from strayline_tally.write import tally_text, write_tally

__all__ = ["TALLY_READER", "TallyReader", "read_tally", "tally_text", "write_tally"]
