"""tetherloop host side: link, session, safety, analysis, workflows, logbook, CLI and TUI."""

__version__ = "0.1.0"
