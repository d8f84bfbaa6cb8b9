"""The night inventory's records: one :class:`FrameRecord` per raw file and the
:class:`NightInventory` of the night with its calibration associations and night log.

Built by :func:`pipeline.night.inventory.take_inventory`; pure data and look-ups.
"""

import math
from dataclasses import asdict, dataclass, field

__all__ = ["FrameRecord", "NightInventory", "replace_record", "FRAME_TYPES", "TARGET_TYPES"]

FRAME_TYPES = ("bias", "flat", "arc", "standard", "science")
TARGET_TYPES = ("standard", "science")
_TARGETS = TARGET_TYPES


@dataclass(frozen=True)
class FrameRecord:
    """What the inventory knows about one raw file (from its header).

    Attributes
    ----------
    frame_id : str
        Raw file name without extension(s), sanitised to ``[A-Za-z0-9._-]``;
        unique in the night.
    path : str
        Path of the raw file.
    frame_type : str
        'bias', 'flat', 'arc', 'standard', 'science', 'ignored' or 'unknown'.
    setup : str
        Setup id built from ``instrument.setup_keywords`` ('' for biases and
        when not known).
    readout : str
        Readout-mode id from ``instrument.readout_keywords`` ('' when not known).
    object : str
        Object name ('' when missing).
    exptime_s : float, s
        Exposure time (nan when missing).
    date_obs : str
        DATE-OBS as written in the header ('' when missing).
    mjd : float, d
        Modified Julian Date (UTC) of the start of exposure (nan when missing).
    status : str
        'ok', 'ignored' or 'rejected'.
    reason : str
        '' for ok; why the file was ignored or rejected otherwise.
    airmass : float
        nan when missing.
    lamps : str
        Arc lamps switched on ('' when missing).
    shape : tuple of int
        ``(ny, nx)`` of the raw pixel array; ``()`` when unreadable.
    binning : tuple of int
        Binning along FITS axes 1 and 2; ``()`` when not known.
    ra, dec : str
        Target coordinates as written in the header (degrees or sexagesimal; ''
        when missing).
    id_values : tuple
        ``(readout values, setup values)``: keyword -> header value as read, from which
        :func:`pipeline.night.inventory.assign_ids` groups the night (``()`` when not read; setup values None for
        biases).
    """

    frame_id: str
    path: str
    frame_type: str
    setup: str
    readout: str
    object: str
    exptime_s: float
    date_obs: str
    mjd: float
    status: str
    reason: str
    airmass: float = math.nan
    lamps: str = ""
    shape: tuple = ()
    binning: tuple = ()
    id_values: tuple = field(default=(), compare=False, repr=False)
    ra: str = ""
    dec: str = ""

    @property
    def ok(self):
        return self.status == "ok"


def replace_record(record, **changes):
    """A copy of ``record`` with some fields changed (records are frozen)."""
    fields_ = asdict(record)
    fields_.update(changes)
    return FrameRecord(**fields_)


@dataclass(frozen=True)
class NightInventory:
    """All frames of a night with the calibration associations.

    Attributes
    ----------
    records : tuple of FrameRecord
        One record per raw file, sorted by frame id.
    """

    records: tuple

    def __post_init__(self):
        index = {}
        for rec in self.records:
            if rec.frame_id in index:
                raise ValueError(f"frame id {rec.frame_id!r} occurs twice in the inventory")
            index[rec.frame_id] = rec
        object.__setattr__(self, "_index", index)

    # -- selections -----------------------------------------------------------------
    def frames(self, frame_type=None, *, setup=None, status="ok"):
        """Records of one frame type (all when None), setup and status (None = any)."""
        return [r for r in self.records
                if (frame_type is None or r.frame_type == frame_type)
                and (setup is None or r.setup == setup)
                and (status is None or r.status == status)]

    def record(self, frame_id):
        """The record of ``frame_id``.

        Raises
        ------
        KeyError
            When the night has no frame of that id.
        """
        try:
            return self._index[frame_id]
        except KeyError:
            raise KeyError(f"no frame {frame_id!r} in the night inventory") from None

    def setups(self):
        """Setups that have usable standard or science frames (sorted)."""
        return sorted({r.setup for r in self.records if r.ok and r.frame_type in _TARGETS})

    def readouts(self):
        """Readout modes that have usable biases (sorted)."""
        return sorted({r.readout for r in self.frames("bias")})

    def calibrated_frames(self):
        """Usable arcs, standards and science frames of the setups in :meth:`setups`."""
        used = set(self.setups())
        return [r for r in self.records if r.ok and r.setup in used
                and r.frame_type in ("arc", "standard", "science")]

    def setup_readout(self, setup):
        """Readout id of the frames of ``setup`` (the one of its flats)."""
        for rec in self.flats_for(setup) + self.frames(None, setup=setup):
            if rec.readout:
                return rec.readout
        raise KeyError(f"setup {setup!r} has no usable frame in the night inventory")

    def bias_for(self, frame_id):
        """Readout id whose master bias calibrates ``frame_id``.

        Raises
        ------
        KeyError
            When the frame is unknown or its readout mode has no usable bias.
        """
        rec = self.record(frame_id)
        if rec.readout not in self.readouts():
            raise KeyError(f"frame {frame_id!r}: readout mode {rec.readout!r} has no usable bias")
        return rec.readout

    def flats_for(self, setup):
        """Usable flats of ``setup``."""
        return self.frames("flat", setup=setup)

    def arcs_for(self, setup):
        """Usable arcs of ``setup``."""
        return self.frames("arc", setup=setup)

    def standards_for(self, setup):
        """Usable standard-star frames of ``setup``."""
        return self.frames("standard", setup=setup)

    def science_for(self, setup):
        """Usable science frames of ``setup``."""
        return self.frames("science", setup=setup)

    def nearest_arc(self, frame_id):
        """The arc of the same setup nearest in time to ``frame_id`` (earlier on a tie).

        Raises
        ------
        KeyError
            When the frame is unknown or its setup has no usable arc.
        """
        rec = self.record(frame_id)
        arcs = self.arcs_for(rec.setup)
        if not arcs:
            raise KeyError(f"frame {frame_id!r}: setup {rec.setup!r} has no usable arc")
        if rec.frame_type == "arc":
            return rec

        def distance(arc):
            gap = abs(arc.mjd - rec.mjd)
            return (gap if math.isfinite(gap) else math.inf,
                    arc.mjd if math.isfinite(arc.mjd) else math.inf, arc.frame_id)

        return min(arcs, key=distance)

    def problems(self):
        """One line per ignored or rejected file: ``'<path>: <status>: <reason>'``.

        The same text as the :class:`~pipeline.core.errors.InputFileWarning` of each;
        for printing where Python warnings are not shown (Snakemake hides the
        warnings raised while it parses the Snakefile).
        """
        return [f"{r.path}: {r.status}: {r.reason}" for r in self.records if r.status != "ok"]

    def to_table(self):
        """The night log as an astropy Table (one row per file)."""
        from astropy.table import Table

        names = ["frame_id", "path", "frame_type", "setup", "readout", "object", "exptime_s",
                 "date_obs", "mjd", "airmass", "lamps", "shape", "status", "reason",
                 "bias", "nearest_arc"]
        rows = []
        for r in self.records:
            bias = arc = ""
            if r.ok and r.frame_type != "bias":
                try:
                    bias = self.bias_for(r.frame_id)
                except KeyError:
                    pass
                if r.frame_type in _TARGETS:
                    try:
                        arc = self.nearest_arc(r.frame_id).frame_id
                    except KeyError:
                        pass
            rows.append((r.frame_id, r.path, r.frame_type, r.setup, r.readout, r.object,
                         r.exptime_s, r.date_obs, r.mjd, r.airmass, r.lamps,
                         "x".join(str(n) for n in r.shape), r.status, r.reason, bias, arc))
        table = Table(rows=rows or None, names=names,
                      dtype=[str, str, str, str, str, str, float, str, float, float, str,
                             str, str, str, str, str])
        table["exptime_s"].unit = "s"
        table["mjd"].unit = "d"
        table.meta["comments"] = [
            "Night log: one row per raw file; status ok / ignored / rejected with the reason.",
            "shape is ny x nx of the raw pixels; bias is the readout id of the master bias;",
            "nearest_arc is the arc of the same setup nearest in time (standards, science).",
        ]
        return table
