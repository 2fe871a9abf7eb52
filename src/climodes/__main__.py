from climodes.cli import main

raise SystemExit(main())
