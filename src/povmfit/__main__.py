from povmfit.fitting.cli import main

raise SystemExit(main())
