from qcmon.cli import main

raise SystemExit(main())
