"""``python -m gradprobe``."""

from .cli import main

main()
