#!/bin/sh
# Fill the password hashes into users.conf and print it without comments, ready
# to use as a Redis ACL file (aclfile) or as an include of redis.conf.
#
#   sh render-users.sh users.conf NAME=PASSWORD_FILE ... > users.acl
#
# Each PASSWORD_FILE holds one password on one line (a trailing newline is
# dropped, as streamrate's redis.password_file does). Passwords are read from
# files, never from arguments, so they do not show in the process list.
# Fails when a placeholder is left without a password file.
set -eu
[ $# -ge 1 ] || { echo "usage: $0 users.conf NAME=PASSWORD_FILE ..." >&2; exit 2; }
template=$1
shift
out=$(grep -v '^[[:space:]]*#' "$template" | grep -v '^[[:space:]]*$')
cr=$(printf '\r')
for pair in "$@"; do
    name=${pair%%=*}
    file=${pair#*=}
    [ "$name" != "$pair" ] || { echo "$0: $pair: write NAME=PASSWORD_FILE" >&2; exit 2; }
    pw=$(cat "$file")
    pw=${pw%"$cr"}
    [ -n "$pw" ] || { echo "$0: $file is empty" >&2; exit 2; }
    hash=$(printf '%s' "$pw" | sha256sum | cut -d' ' -f1)
    upper=$(printf '%s' "$name" | tr '[:lower:]' '[:upper:]')
    out=$(printf '%s\n' "$out" | sed "s/#SHA256_OF_${upper}_PASSWORD/#${hash}/")
done
if printf '%s\n' "$out" | grep -q 'SHA256_OF_'; then
    echo "$0: no password file for: $(printf '%s\n' "$out" | grep -o 'SHA256_OF_[A-Z_]*' | tr '\n' ' ')" >&2
    exit 2
fi
printf '%s\n' "$out"
