import sys

from apportion.cli.app import main

sys.exit(main())
