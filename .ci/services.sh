#!/usr/bin/env bash
# Start PostgreSQL and MariaDB if they are installed and not running (idempotent), then
# create the throw-away database `segwatch_test` on each (dropped and created afresh).
# The engine tests create uniquely named schemas/tables inside it and drop them again;
# they fall back to the database `test`, and skip with a reason when a server is absent.
set -u
status=0
if command -v pg_ctlcluster >/dev/null 2>&1; then
  if ! pg_isready -h 127.0.0.1 -p 5432 -q 2>/dev/null; then
    ver=$(ls /etc/postgresql 2>/dev/null | sort -V | tail -n 1)
    [ -n "$ver" ] && pg_ctlcluster --skip-systemctl-redirect "$ver" main start || status=1
    for _ in $(seq 1 30); do pg_isready -h 127.0.0.1 -p 5432 -q 2>/dev/null && break; sleep 1; done
  fi
fi
if command -v mariadbd >/dev/null 2>&1 || [ -x /usr/sbin/mariadbd ]; then
  if ! mariadb-admin -uroot ping >/dev/null 2>&1; then
    start-stop-daemon --start --oknodo --background --exec /usr/sbin/mariadbd || status=1
    for _ in $(seq 1 30); do mariadb-admin -uroot ping >/dev/null 2>&1 && break; sleep 1; done
  fi
fi

# Throw-away test databases (a failure here only means the tests use `test` or skip).
if command -v psql >/dev/null 2>&1 && pg_isready -h 127.0.0.1 -p 5432 -q 2>/dev/null; then
  for user in postgres root; do
    if psql -h 127.0.0.1 -U "$user" -d postgres -qAtc "SELECT 1" >/dev/null 2>&1; then
      psql -h 127.0.0.1 -U "$user" -d postgres -q -c "DROP DATABASE IF EXISTS segwatch_test" \
        -c "CREATE DATABASE segwatch_test" >/dev/null 2>&1 \
        || echo "services: could not create the PostgreSQL database segwatch_test"
      break
    fi
  done
fi
if command -v mariadb >/dev/null 2>&1 && mariadb-admin -uroot ping >/dev/null 2>&1; then
  mariadb -uroot -e "DROP DATABASE IF EXISTS segwatch_test; CREATE DATABASE segwatch_test" >/dev/null 2>&1 \
    || echo "services: could not create the MariaDB database segwatch_test"
fi
exit $status
