import sys

from mdrotor.commands.main import main

sys.exit(main())
