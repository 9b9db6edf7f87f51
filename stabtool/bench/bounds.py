"""Accuracy bounds of the fitter, in one place.

Source: the issue bounds of the fitter (the capacitance-model fitter's
acceptance criteria on generator maps): virtual-gate elements within 0.005
on clean maps and 0.02 on noisy ones, gate capacitances ``Cdg`` within 2 %,
lever arms (from the electron temperature) within 5 %, charging energies
within 5 %.

A result whose quality verdict is ``ok`` but whose error exceeds one of these
bounds is a *silent failure*: the tool claimed to be sure and was wrong.

The benchmark, its regression test and its plots all read the bounds from
here, so a change of the fitter's promise is made once.
"""

from __future__ import annotations

from dataclasses import dataclass

__all__ = ["BOUNDS_SOURCE", "FITTER_BOUNDS", "FitterBounds"]

#: Where the numbers of :data:`FITTER_BOUNDS` come from.
BOUNDS_SOURCE = "issue bounds of the fitter"


@dataclass(frozen=True)
class FitterBounds:
    """Largest error a result reported ``ok`` may have.

    Attributes
    ----------
    virtual_gate_clean : float
        Absolute error of an off-diagonal virtual-gate element when
        ``snr >= clean_snr`` (dimensionless).
    virtual_gate_noisy : float
        Same, for ``snr < clean_snr``.
    clean_snr : float
        SNR (charge-step height / noise std) from which a map counts as clean.
    cdg_rel : float
        Relative error of each gate-capacitance element.
    lever_arm_rel : float
        Relative error of each lever-arm element.
    charging_energy_rel : float
        Relative error of E_C1, E_C2 and the mutual E_Cm.
    """

    virtual_gate_clean: float = 0.005
    virtual_gate_noisy: float = 0.02
    clean_snr: float = 10.0
    cdg_rel: float = 0.02
    lever_arm_rel: float = 0.05
    charging_energy_rel: float = 0.05

    def virtual_gate(self, snr: float) -> float:
        """Virtual-gate bound (absolute) at signal-to-noise ratio ``snr``."""
        return self.virtual_gate_clean if snr >= self.clean_snr else self.virtual_gate_noisy

    def for_snr(self, snr: float) -> dict[str, float]:
        """Bound of each checked quantity at ``snr``, keyed like the benchmark's groups.

        Keys: ``virtual_gate`` (absolute), ``cdg``, ``lever_arm``,
        ``charging_energy`` (relative).
        """
        return {
            "virtual_gate": self.virtual_gate(snr),
            "cdg": self.cdg_rel,
            "lever_arm": self.lever_arm_rel,
            "charging_energy": self.charging_energy_rel,
        }

    def to_dict(self) -> dict:
        """JSON form, with the source of the numbers."""
        return {
            "source": BOUNDS_SOURCE,
            "virtual_gate_abs": {
                f"snr>={self.clean_snr:g}": self.virtual_gate_clean,
                f"snr<{self.clean_snr:g}": self.virtual_gate_noisy,
            },
            "cdg_rel": self.cdg_rel,
            "lever_arm_rel": self.lever_arm_rel,
            "charging_energy_rel": self.charging_energy_rel,
        }


#: The bounds every part of the benchmark uses.
FITTER_BOUNDS = FitterBounds()
