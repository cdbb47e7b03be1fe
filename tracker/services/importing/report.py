"""What an import did (or, with ``dry_run``, would do): counts, accepted values, warnings."""

from __future__ import annotations

from dataclasses import dataclass, field

from tracker.errors import Problem


@dataclass
class ImportReport:
    """What an import did (or, with ``dry_run``, would do)."""

    kind: str
    rows: int
    dry_run: bool
    added: int = 0
    replaced: int = 0
    unchanged: int = 0
    patients_added: int = 0
    identities: int = 0  # patients file: patients whose identity fields were added or replaced
    unusual: list[Problem] = field(default_factory=list)
    warnings: list[Problem] = field(default_factory=list)  # imported all the same; worth a look
    # Sort key of each warning (kind of warning, patient, visit date): a file imported in blocks lists its
    # warnings in the order of the whole file.
    warning_keys: list[tuple] = field(default_factory=list, repr=False)

    def summary(self) -> str:
        if self.kind == "patients":
            return self._patients_summary()
        noun = {"measurements": "visits", "treatments": "treatment periods", "scores": "scores"}[self.kind]
        verb = "would add" if self.dry_run else "added"
        text = (
            f"{self.kind}: {self.rows} rows checked; {verb} {self.added} {noun}, "
            f"{'would replace' if self.dry_run else 'replaced'} {self.replaced}, {self.unchanged} unchanged"
        )
        if self.kind == "measurements":
            text += f"; {self.patients_added} new patients"
        if self.unusual:
            text += f"; {len(self.unusual)} unusual values accepted with --allow-unusual"
        return text + (" (dry run: nothing written)" if self.dry_run else "")

    def _patients_summary(self) -> str:
        """Counts only: a patients file may carry names, and a summary never repeats one."""
        would = "would be " if self.dry_run else ""
        text = (
            f"patients: {self.rows} rows checked; {self.added} patients {would}given new details, "
            f"{self.replaced} {would}replaced, {self.unchanged} unchanged; identity fields of "
            f"{self.identities} patients {would}stored apart from the pseudonymous record"
        )
        return text + (" (dry run: nothing written)" if self.dry_run else "")
