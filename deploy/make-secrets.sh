#!/usr/bin/env sh
# Create deploy/secrets/postgres_password and the matching deploy/secrets/database_url for
# compose.yaml. Existing files are kept. The files are made readable by uid 10001 (the image's
# user), because compose mounts file secrets with their host owner and mode.
set -eu
dir="$(dirname "$0")/secrets"
mkdir -p "$dir"
umask 077
if [ ! -s "$dir/postgres_password" ]; then
    python3 -c "import secrets; print(secrets.token_urlsafe(32))" > "$dir/postgres_password"
fi
if [ ! -s "$dir/database_url" ]; then
    printf 'postgresql://seedbed:%s@postgres:5432/seedbed\n' "$(cat "$dir/postgres_password")" \
        > "$dir/database_url"
fi
if [ "$(id -u)" = 0 ]; then
    chown 10001 "$dir/database_url"
else
    chmod 0444 "$dir/database_url"
    echo "note: not root, so database_url is world-readable on this host; chown it to 10001 instead if others share the host" >&2
fi
echo "secrets are in $dir"
