#!/usr/bin/env bash
# Start PostgreSQL and MariaDB if they are installed and not running (idempotent).
set -u
status=0
if command -v pg_ctlcluster >/dev/null 2>&1; then
  if ! pg_isready -h 127.0.0.1 -p 5432 -q 2>/dev/null; then
    ver=$(ls /etc/postgresql 2>/dev/null | sort -V | tail -n 1)
    [ -n "$ver" ] && pg_ctlcluster --skip-systemctl-redirect "$ver" main start || status=1
  fi
fi
if command -v mariadbd >/dev/null 2>&1 || [ -x /usr/sbin/mariadbd ]; then
  if ! mariadb-admin -uroot ping >/dev/null 2>&1; then
    start-stop-daemon --start --oknodo --background --exec /usr/sbin/mariadbd || status=1
    for _ in $(seq 1 30); do mariadb-admin -uroot ping >/dev/null 2>&1 && break; sleep 1; done
  fi
fi
exit $status
