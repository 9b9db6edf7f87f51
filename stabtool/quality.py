"""The quality verdict carried by every analysis result."""

from __future__ import annotations

from collections.abc import Callable
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
    #: Per warning: did it clear ``ok``? (kept by ``with_warning``/``merge``; not compared)
    doubtful_flags: tuple[bool, ...] = field(default_factory=tuple, compare=False, repr=False)

    def __bool__(self) -> bool:
        return self.ok

    def _flags(self) -> tuple[bool, ...] | None:
        """Per-warning doubt flags when they are known and explain ``ok``, else None."""
        f = self.doubtful_flags
        if len(f) == len(self.warnings) and self.ok == (not any(f)):
            return f
        return None

    def with_warning(self, message: str, *, doubtful: bool = True) -> "Quality":
        """Return a copy with ``message`` added (and ``ok`` cleared if ``doubtful``)."""
        f = self._flags()
        flags = f + (bool(doubtful),) if f is not None else ()
        return Quality(ok=self.ok and not doubtful, warnings=self.warnings + (message,), doubtful_flags=flags)

    def merge(self, other: "Quality") -> "Quality":
        """Combine two verdicts: ok only if both are; warnings concatenated."""
        fa, fb = self._flags(), other._flags()
        flags = fa + fb if fa is not None and fb is not None else ()
        return Quality(ok=self.ok and other.ok, warnings=self.warnings + other.warnings, doubtful_flags=flags)

    def without(self, drop: Callable[[str], bool]) -> "Quality":
        """Copy without the warnings for which ``drop(message)`` is true.

        ``ok`` is recomputed from the remaining warnings when every warning's
        doubt is known (built with :meth:`with_warning` / :meth:`merge`);
        otherwise it is kept as it is (never turned ok without knowing why it
        was not).
        """
        f = self._flags()
        keep = [i for i, w in enumerate(self.warnings) if not drop(w)]
        warns = tuple(self.warnings[i] for i in keep)
        if f is None:
            return Quality(ok=self.ok, warnings=warns)
        flags = tuple(f[i] for i in keep)
        return Quality(ok=not any(flags), warnings=warns, doubtful_flags=flags)

    def doubts_first(self) -> tuple[str, ...]:
        """The warnings with those that cleared ``ok`` first (order kept within each group).

        When the per-warning doubts are not known, the warnings as they are.
        """
        f = self._flags()
        if f is None:
            return self.warnings
        return tuple(w for w, d in zip(self.warnings, f) if d) + tuple(w for w, d in zip(self.warnings, f) if not d)

    def doubts_first_flagged(self) -> tuple[tuple[str, ...], tuple[bool, ...] | None]:
        """:meth:`doubts_first` and, per warning in that order, whether it cleared ``ok``.

        The flags are None when the per-warning doubts are not known.
        """
        f = self._flags()
        if f is None:
            return self.warnings, None
        n_doubts = sum(f)
        return self.doubts_first(), tuple(i < n_doubts for i in range(len(f)))

    def to_dict(self) -> dict:
        """JSON form ``{"ok": bool, "warnings": [...]}``, the warnings that cleared ``ok`` first."""
        return {"ok": bool(self.ok), "warnings": list(self.doubts_first())}
