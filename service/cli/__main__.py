import sys

from service.cli.main import main

sys.exit(main())
