import sys

from vault.cli import main

sys.exit(main())
