import sys

from apportion.cli.main import main

sys.exit(main())
