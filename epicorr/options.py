"""Every user-selectable option of the package, validated in one place.

Options are :class:`enum.Enum` subclasses whose values are the plain strings
used on the command line and in sidecars.  Code that receives an option from
outside (CLI, node trait, workflow argument) passes it through
:func:`parse_option`, which accepts the enum member itself or its string value
(case-insensitive) and raises :class:`~epicorr.errors.EpicorrInputError`
listing the allowed values otherwise.  Add a new option as a new enum here;
do not scatter string comparisons through the code.
"""

from __future__ import annotations

import enum
from typing import TypeVar

from .errors import EpicorrInputError

__all__ = [
    "Interpolation",
    "PhaseScaling",
    "FieldUnits",
    "SliceProfile",
    "Executor",
    "FieldSourceKind",
    "parse_option",
    "EchoKind",
]


class _Option(str, enum.Enum):
    """Base for string-valued options (``str(member) == member.value``)."""

    def __str__(self) -> str:  # pragma: no cover - trivial
        return self.value


class Interpolation(_Option):
    """1-D interpolation along the phase-encode axis."""

    CUBIC = "cubic"    #: cubic B-spline (default)
    LINEAR = "linear"  #: linear


class PhaseScaling(_Option):
    """How phase images are coded."""

    AUTO = "auto"        #: detect from the data range
    RADIANS = "radians"  #: values already in radians, within [-pi, pi] (or [0, 2 pi])
    INTEGER = "integer"  #: scanner integer coding, e.g. -4096..4095 spanning 2 pi


class FieldUnits(_Option):
    """Units of a direct field map (BIDS ``Units`` of a ``fieldmap``)."""

    HZ = "Hz"
    RAD_PER_S = "rad/s"
    TESLA = "T"


class SliceProfile(_Option):
    """Slice-excitation profile used by the through-plane dropout model."""

    RECTANGULAR = "rectangular"
    GAUSSIAN = "gaussian"


class Executor(_Option):
    """Where the batch command runs its nodes."""

    SERIAL = "serial"  #: one node after another in this process
    LOCAL = "local"    #: parallel processes on this machine
    SLURM = "slurm"    #: jobs on a Slurm cluster


class FieldSourceKind(_Option):
    """The four BIDS field-map cases (BIDS specification, "Fieldmap data")."""

    REVERSED_PE = "reversed-pe"  #: ``epi`` images with opposite phase-encode polarity
    PHASEDIFF = "phasediff"      #: ``phasediff`` + ``magnitude1`` (+ ``magnitude2``)
    TWO_PHASES = "two-phases"    #: ``phase1``/``phase2`` + magnitudes
    FIELDMAP = "fieldmap"        #: a direct ``fieldmap`` (Hz, rad/s or T) + ``magnitude``


E = TypeVar("E", bound=enum.Enum)


def parse_option(enum_cls: type[E], value: object, *, name: str, file: object = None) -> E:
    """Validate ``value`` as a member of ``enum_cls``.

    Parameters
    ----------
    enum_cls : Enum subclass
        One of the option enums of this module.
    value : enum member or str
        The value given by the user (string matching is case-insensitive).
    name : str
        Option or metadata key name, used in the error message.
    file : str, optional
        File the value came from, used in the error message.

    Returns
    -------
    member : enum_cls

    Raises
    ------
    EpicorrInputError
        If ``value`` is not an allowed value; the message lists the allowed ones.

    Examples
    --------
    >>> parse_option(Interpolation, "Cubic", name="--interpolation")
    <Interpolation.CUBIC: 'cubic'>
    """
    if isinstance(value, enum_cls):
        return value
    if isinstance(value, str):
        wanted = value.strip().lower()
        for member in enum_cls:
            if str(member.value).lower() == wanted:
                return member
    allowed = ", ".join(repr(m.value) for m in enum_cls)
    raise EpicorrInputError("not an allowed value", file=file, key=name, value=value,
                            hint=f"use one of {allowed}")


class EchoKind(_Option):
    """Echo type of an EPI series (the simulator, and the dropout model's choice of physics)."""

    SPIN_ECHO = "spin-echo"          #: static off-resonance phase refocused at TE
    GRADIENT_ECHO = "gradient-echo"  #: static phase accrues over TE (through-plane dephasing)
