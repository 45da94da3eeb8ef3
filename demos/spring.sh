#!/usr/bin/env bash
# The whole job on the synthetic spring rig; see rig_job.sh. Usage: demos/spring.sh [OUTDIR] [BUDGET]
exec "$(dirname "$0")/rig_job.sh" spring "$@"
