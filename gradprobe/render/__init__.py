"""Renderers: functions of a Report that return text. They never compute numerics.
:mod:`.console` is where the command writes them (consoles, progress, report files)."""
