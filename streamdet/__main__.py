from streamdet.cli import main

raise SystemExit(main())
