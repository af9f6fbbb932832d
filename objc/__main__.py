import sys

try:
    from objc.cli import main
except KeyboardInterrupt:  # Ctrl-C while objc was still loading: nothing had started, so nothing was written
    sys.stderr.write("objc: interrupted; no output was left half-written\n")
    sys.exit(130)

sys.exit(main())
