#!/usr/bin/env bash
# The whole job on the synthetic pendulum rig; see rig_job.sh. Usage: demos/pendulum.sh [OUTDIR] [BUDGET]
exec "$(dirname "$0")/rig_job.sh" pendulum "$@"
