import sys

from vault.cli.app import main

sys.exit(main())
