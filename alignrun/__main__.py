from alignrun.cli import main

raise SystemExit(main())
