#!/usr/bin/env bash
# The whole job on the synthetic airtable rig; see rig_job.sh. Usage: demos/airtable.sh [OUTDIR] [BUDGET]
exec "$(dirname "$0")/rig_job.sh" airtable "$@"
