from daq.cli import main

raise SystemExit(main())
