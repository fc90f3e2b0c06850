#!/bin/sh
# make demo: run the invented scenario through the real daemon.
exec /usr/bin/python3 "$(dirname "$0")/demo.py" "${1:-build}"
