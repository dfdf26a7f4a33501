"""Renderers: functions of a Report that return text. They never compute numerics."""
