from towers.cli import main

raise SystemExit(main())
