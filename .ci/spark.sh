#!/usr/bin/env bash
# Spark SQL for the live engine tests, from the pip package `pyspark` (which ships the
# spark-hive-thriftserver jar but not the sbin/ start scripts), all on 127.0.0.1:
#
#   bash .ci/spark.sh start DIR            Spark's Thrift server (HiveThriftServer2), --master local[2]
#   bash .ci/spark.sh start-cluster DIR    a standalone master + one worker, and a Thrift server on them
#   bash .ci/spark.sh wait DIR [KIND]      block until the server(s) started in DIR answer a query
#   bash .ci/spark.sh stop DIR             stop every process started in DIR (by the ids it recorded)
#
# `start`/`start-cluster` return once the server answers (unless SPARK_NO_WAIT=1: then
# call `wait`). DIR holds the warehouse, the Derby metastore, the logs, and per process
# `<name>.pid`; each Thrift server's port is in `local.port` / `cluster.port`. Every
# process runs in its own process group; `stop` ends those groups by id (TERM, then KILL).
# A start that fails stops what it had started (trap).
#
# The Thrift servers' session time zone is UTC, except where SPARK_CLUSTER_ZONE says
# otherwise for the cluster (the tests start it with America/New_York, a server whose
# default zone is not UTC). Memory is kept small (a shared 2-core machine): local server
# 768 MB; cluster: daemons 256 MB each, driver 512 MB, one executor of 512 MB.
#
# Environment: PYTHON (default python3; its pyspark and pyhive are used), SPARK_WAIT_SECONDS
# (default 300: the server took 40-90 s here).
set -euo pipefail

PY=${PYTHON:-python3}
WAIT_SECONDS=${SPARK_WAIT_SECONDS:-300}

die() { echo "spark.sh: $*" >&2; exit 1; }

spark_home() {
  "$PY" -c 'import os, pyspark; print(os.path.dirname(pyspark.__file__))' 2>/dev/null \
    || die "pyspark is not installed for $PY (pip install pyspark pyhive thrift thrift-sasl pure-sasl)"
}

free_port() {
  "$PY" -c 'import socket; s = socket.socket(); s.bind(("127.0.0.1", 0)); print(s.getsockname()[1])'
}

# start_bg DIR NAME CMD...: run CMD in its own session (process group) with its log in DIR/NAME.log
start_bg() {
  local dir=$1 name=$2
  shift 2
  setsid "$@" >"$dir/$name.log" 2>&1 </dev/null &
  echo $! >"$dir/$name.pid"
}

stop_dir() {
  local dir=$1 f pid
  [ -d "$dir" ] || return 0
  # the Thrift servers first (their executors go with them), then worker and master
  for name in cluster local worker master; do
    f="$dir/$name.pid"
    [ -f "$f" ] || continue
    pid=$(cat "$f")
    if kill -0 "$pid" 2>/dev/null; then
      kill -TERM -- "-$pid" 2>/dev/null || kill -TERM "$pid" 2>/dev/null || true
      for _ in $(seq 1 30); do kill -0 "$pid" 2>/dev/null || break; sleep 0.5; done
      kill -KILL -- "-$pid" 2>/dev/null || true
    fi
    # anything left in the group (e.g. an executor started by the worker)
    kill -KILL -- "-$pid" 2>/dev/null || true
    rm -f "$f"
  done
}

# thrift DIR KIND MASTER ZONE EXTRA...: a HiveThriftServer2 with its own warehouse and Derby metastore
thrift() {
  local dir=$1 kind=$2 master=$3 zone=$4
  shift 4
  local home port state
  home=$(spark_home)
  port=$(free_port)
  state="$dir/$kind"
  mkdir -p "$state/warehouse" "$state/tmp"
  echo "$port" >"$dir/$kind.port"
  SPARK_LOCAL_IP=127.0.0.1 SPARK_LOCAL_DIRS="$state/tmp" SPARK_LOG_DIR="$state" \
    start_bg "$dir" "$kind" "$home/bin/spark-submit" \
    --class org.apache.spark.sql.hive.thriftserver.HiveThriftServer2 \
    --name "segwatch-test-$kind" \
    --master "$master" \
    --driver-memory 768m \
    --driver-java-options "-Dderby.system.home=$state -Djava.io.tmpdir=$state/tmp -XX:+UseSerialGC" \
    --conf spark.driver.host=127.0.0.1 \
    --conf spark.driver.bindAddress=127.0.0.1 \
    --conf spark.ui.enabled=false \
    --conf spark.sql.warehouse.dir="$state/warehouse" \
    --conf spark.sql.session.timeZone="$zone" \
    --conf spark.sql.shuffle.partitions=4 \
    --conf "spark.hadoop.javax.jdo.option.ConnectionURL=jdbc:derby:;databaseName=$state/metastore_db;create=true" \
    "$@" \
    --hiveconf hive.server2.thrift.bind.host=127.0.0.1 \
    --hiveconf hive.server2.thrift.port="$port" \
    --hiveconf hive.server2.transport.mode=binary \
    spark-internal
}

# answers DIR KIND: one query through PyHive (what segwatch uses)
answers() {
  local port
  port=$(cat "$1/$2.port")
  "$PY" - "$port" <<'EOF' >/dev/null 2>&1
import sys
from pyhive import hive
conn = hive.connect(host="127.0.0.1", port=int(sys.argv[1]), username="segwatch")
cur = conn.cursor()
cur.execute("SELECT 1")
assert cur.fetchall() == [(1,)]
conn.close()
EOF
}

wait_for() {
  local dir=$1 kind=$2 pid t0
  pid=$(cat "$dir/$kind.pid")
  t0=$(date +%s)
  while ! answers "$dir" "$kind"; do
    kill -0 "$pid" 2>/dev/null || die "the $kind Thrift server exited while starting; its log: $(tail -n 5 "$dir/$kind.log" | tr '\n' ' ' | cut -c1-600)"
    [ $(( $(date +%s) - t0 )) -lt "$WAIT_SECONDS" ] || die "the $kind Thrift server did not answer within ${WAIT_SECONDS}s (log: $dir/$kind.log)"
    sleep 2
  done
  echo "spark.sh: $kind Thrift server answers on 127.0.0.1:$(cat "$dir/$kind.port") after $(( $(date +%s) - t0 ))s"
}

start_local() {
  local dir=$1
  thrift "$dir" local "local[2]" UTC
}

start_cluster() {
  local dir=$1 home mport wport
  home=$(spark_home)
  mport=$(free_port)
  mkdir -p "$dir/standalone"
  echo "$mport" >"$dir/master.port"
  free_port >"$dir/master.webui"  # the master's status page (JSON at /json/)
  SPARK_LOCAL_IP=127.0.0.1 SPARK_DAEMON_MEMORY=256m SPARK_LOG_DIR="$dir/standalone" \
    start_bg "$dir" master "$home/bin/spark-class" org.apache.spark.deploy.master.Master \
    --host 127.0.0.1 --port "$mport" --webui-port "$(cat "$dir/master.webui")"
  wport=$(free_port)
  SPARK_LOCAL_IP=127.0.0.1 SPARK_DAEMON_MEMORY=256m SPARK_LOG_DIR="$dir/standalone" \
    SPARK_WORKER_DIR="$dir/standalone/work" \
    start_bg "$dir" worker "$home/bin/spark-class" org.apache.spark.deploy.worker.Worker \
    --host 127.0.0.1 --port "$wport" --webui-port "$(free_port)" --cores 2 --memory 640m \
    "spark://127.0.0.1:$mport"
  thrift "$dir" cluster "spark://127.0.0.1:$mport" "${SPARK_CLUSTER_ZONE:-UTC}" \
    --conf spark.executor.memory=512m --conf spark.executor.cores=2 --conf spark.cores.max=2
}

cmd=${1:-}
dir=${2:-}
[ -n "$cmd" ] && [ -n "$dir" ] || die "usage: $0 start|start-cluster|wait|stop DIR [local|cluster]"
case "$cmd" in
  start|start-cluster)
    mkdir -p "$dir"
    dir=$(cd "$dir" && pwd)
    command -v java >/dev/null 2>&1 || [ -n "${JAVA_HOME:-}" ] || die "no Java runtime (Spark needs Java 17 or 21)"
    trap 'stop_dir "$dir"' EXIT  # a failed or interrupted start leaves nothing running
    trap 'exit 1' INT TERM
    if [ "$cmd" = start ]; then kind=local; start_local "$dir"; else kind=cluster; start_cluster "$dir"; fi
    [ "${SPARK_NO_WAIT:-0}" = 1 ] || wait_for "$dir" "$kind"
    trap - EXIT INT TERM
    ;;
  wait)
    dir=$(cd "$dir" && pwd)
    trap 'stop_dir "$dir"' EXIT
    trap 'exit 1' INT TERM
    for kind in ${3:-local cluster}; do
      if [ -f "$dir/$kind.pid" ]; then wait_for "$dir" "$kind"; fi
    done
    trap - EXIT INT TERM
    ;;
  stop)
    stop_dir "$dir"
    ;;
  *)
    die "unknown command $cmd (start, start-cluster, wait, stop)"
    ;;
esac
