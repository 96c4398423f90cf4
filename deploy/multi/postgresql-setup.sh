#!/bin/sh
# One-time PostgreSQL set-up for a shared tickmark ledger (Debian's
# postgresql package, on the database host). tickmarkd creates and migrates
# its tables itself on first start (numbered migrations in
# schema_migrations); the role only needs to own the database.
set -eu
runuser -u postgres -- psql -v ON_ERROR_STOP=1 <<'SQL'
CREATE ROLE tickmark LOGIN PASSWORD 'change-me';
CREATE DATABASE tickmark OWNER tickmark;
SQL
# Let the instances in (adjust the network), then reload:
#   echo "hostssl tickmark tickmark 10.0.0.0/24 scram-sha-256" >> /etc/postgresql/15/main/pg_hba.conf
#   and listen_addresses = '*' in /etc/postgresql/15/main/postgresql.conf
#   systemctl reload postgresql
# On each instance host, the password for libpq (mode 0600, owned by tickmark):
#   echo "10.0.0.10:5432:tickmark:tickmark:change-me" > /var/lib/tickmark/.pgpass
