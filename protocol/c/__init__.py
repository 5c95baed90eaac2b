"""Host tooling of the portable C99 board side: build it (build.py) and drive it (binding.py).

The C sources beside this file are the board side itself; see README.md in this folder.
"""
