"""Alarm review for clinical engineers: explain one alarm, a replay report, what-if
comparison of rule sets and reviewers' annotations. Shell side: reads files, draws."""
