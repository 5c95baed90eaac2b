import sys

from . import main

if __name__ == "__main__":  # guarded: the analysis worker process imports this module too
    sys.exit(main())
