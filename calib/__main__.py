from calib.cli import main

raise SystemExit(main())
