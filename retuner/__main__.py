import sys

from retuner.cli import main

sys.exit(main())
