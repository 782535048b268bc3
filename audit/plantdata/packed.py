"""A value kept compressed until an output reads it (what the run's process holds per loop).

The per-loop plant-data task (:mod:`audit.plantdata.loopdata`) draws the report's charts of each
loop -- the loop-health charts and the model check's overlay -- where it analysed the record, and
returns them drawn (SVG text, polyline text) instead of their plot arrays. Drawn text compresses
well (a loop's three health charts, about 20 kB of SVG, to about 7 kB), so the run's process keeps
each loop's drawings packed and unpacks them only while the page is written.
"""

from __future__ import annotations

import pickle
import zlib
from dataclasses import dataclass
from typing import Any

#: zlib level: the drawings are packed once per loop, in the worker; 6 is zlib's own default. [-]
LEVEL = 6


@dataclass(frozen=True)
class Packed:
    """A picklable value, pickled and zlib-compressed.

    Attributes
    ----------
    blob : bytes
        The compressed pickle.
    """

    blob: bytes

    @classmethod
    def of(cls, value: Any) -> "Packed":
        """Pack ``value``.

        Parameters
        ----------
        value : object
            Any picklable value (the run's own data: it is unpacked only by this program).

        Returns
        -------
        Packed
        """
        return cls(zlib.compress(pickle.dumps(value, protocol=pickle.HIGHEST_PROTOCOL), LEVEL))

    def unpack(self) -> Any:
        """The value packed (a new copy at each call)."""
        return pickle.loads(zlib.decompress(self.blob))

    @property
    def size(self) -> int:
        """Bytes held. [B]"""
        return len(self.blob)
