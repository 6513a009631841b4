import sys

from qfit.cli.main import main

sys.exit(main())
