from fieldmix.cli import main

raise SystemExit(main())
