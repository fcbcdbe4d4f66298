"""Starting analyses written by ``doseattr init KIND DIR`` (invented numbers)."""
