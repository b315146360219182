from towerflow.cli import main

raise SystemExit(main())
