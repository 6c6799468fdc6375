from holonomic.bench.suite import main

raise SystemExit(main())
