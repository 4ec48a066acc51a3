from shrinkwrap.cli import main

if __name__ == "__main__":   # not when a spawned worker process (shrinkwrap serve) imports this module again
    raise SystemExit(main())
