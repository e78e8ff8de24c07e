"""Pure science: functions over numpy arrays and ASE ``Atoms``; no files, no processes."""
