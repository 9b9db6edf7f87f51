"""The quality verdict carried by every analysis result."""

from __future__ import annotations

from dataclasses import dataclass, field

__all__ = ["Quality"]


@dataclass(frozen=True)
class Quality:
    """Verdict on a result: ``ok`` is False whenever any result is doubtful.

    Attributes
    ----------
    ok : bool
        True only when every reported number is trustworthy within the
        documented bounds.
    warnings : tuple of str
        One line each: what is doubtful and why.
    """

    ok: bool = True
    warnings: tuple[str, ...] = field(default_factory=tuple)

    def __bool__(self) -> bool:
        return self.ok

    def with_warning(self, message: str, *, doubtful: bool = True) -> "Quality":
        """Return a copy with ``message`` added (and ``ok`` cleared if ``doubtful``)."""
        return Quality(ok=self.ok and not doubtful, warnings=self.warnings + (message,))

    def merge(self, other: "Quality") -> "Quality":
        """Combine two verdicts: ok only if both are; warnings concatenated."""
        return Quality(ok=self.ok and other.ok, warnings=self.warnings + other.warnings)

    def to_dict(self) -> dict:
        """JSON form ``{"ok": bool, "warnings": [...]}``."""
        return {"ok": bool(self.ok), "warnings": list(self.warnings)}
