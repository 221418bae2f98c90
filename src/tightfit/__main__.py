from tightfit.cli import main

raise SystemExit(main())
