"""The audit trail: manifest, RO-Crate, diff, verify, archive and the plan lock."""
