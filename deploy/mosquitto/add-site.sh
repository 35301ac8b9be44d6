#!/usr/bin/env bash
# Give a site its broker credentials: user name = site id, in Mosquitto's password file.
#
#   add-site.sh [--generate] [--replace] SITE_ID [PASSWORD_FILE]
#
# The password is read as one line from standard input (typed twice, without echo,
# at a terminal), or with --generate made up here (32 random characters, 192 bits)
# and printed once on standard output: nothing else keeps it.
# An existing site is refused unless --replace is given (password rotation).
# PASSWORD_FILE defaults to /etc/mosquitto/tocsin.passwd. The broker reads the change
# on reload (systemctl reload mosquitto); a site whose password changed is then
# disconnected and must log in with the new one.
# Exit codes: 0 done, 2 bad usage or bad input, 1 failure.
set -euo pipefail

usage="usage: add-site.sh [--generate] [--replace] SITE_ID [PASSWORD_FILE]"
generate=0
replace=0
while [[ $# -gt 0 ]]; do
    case "$1" in
        --generate) generate=1; shift ;;
        --replace) replace=1; shift ;;
        -h|--help) echo "$usage"; exit 0 ;;
        --) shift; break ;;
        -*) echo "add-site.sh: unknown option '$1'; $usage" >&2; exit 2 ;;
        *) break ;;
    esac
done
if [[ $# -lt 1 || $# -gt 2 ]]; then
    echo "add-site.sh: $usage" >&2
    exit 2
fi
site=$1
pwfile=${2:-/etc/mosquitto/tocsin.passwd}

# The registry's site id rule (CONTRACT.md §2). It also keeps '+', '#', '/' and
# ':' out of the user name, which the ACL's %u and the password file rely on.
if [[ ! $site =~ ^[a-z0-9][a-z0-9-]{0,62}$ ]]; then
    printf "add-site.sh: site id '%s' is not a valid site id ([a-z0-9][a-z0-9-]{0,62})\n" \
        "$site" >&2
    exit 2
fi
# tocsin-service, tocsin-observer and tocsin-relay are the broker's own users (acl).
if [[ $site == tocsin-* ]]; then
    echo "add-site.sh: site id '$site' starts with 'tocsin-', reserved for Tocsin's own users" >&2
    exit 2
fi

command -v mosquitto_passwd >/dev/null || {
    echo "add-site.sh: mosquitto_passwd not found (apt-get install mosquitto)" >&2
    exit 1
}

exists=0
if [[ -f $pwfile ]] && grep -q "^${site}:" "$pwfile"; then
    exists=1
fi
if [[ $exists -eq 1 && $replace -eq 0 ]]; then
    echo "add-site.sh: site '$site' is already in $pwfile (use --replace to change its password)" >&2
    exit 2
fi
if [[ $exists -eq 0 && $replace -eq 1 ]]; then
    echo "add-site.sh: --replace: site '$site' is not in $pwfile" >&2
    exit 2
fi

if [[ $generate -eq 1 ]]; then
    password=$(head -c 24 /dev/urandom | base64 | tr '+/' '-_')
elif [[ -t 0 ]]; then
    IFS= read -r -s -p "password for site $site: " password; echo >&2
    IFS= read -r -s -p "again: " again; echo >&2
    if [[ $password != "$again" ]]; then
        echo "add-site.sh: the two passwords differ" >&2
        exit 2
    fi
else
    IFS= read -r password || true
fi
if [[ -z $password ]]; then
    echo "add-site.sh: empty password for site '$site' (give one on stdin or use --generate)" >&2
    exit 2
fi

# The password goes to mosquitto_passwd on its standard input, never on a command
# line (where other users could see it in the process list).
umask 077
create=()
if [[ ! -f $pwfile ]]; then
    create=(-c)
fi
if ! printf '%s\n%s\n' "$password" "$password" \
        | mosquitto_passwd "${create[@]}" "$pwfile" "$site" >/dev/null; then
    echo "add-site.sh: mosquitto_passwd failed for site '$site' in $pwfile" >&2
    exit 1
fi
# A new file: the broker (user mosquitto) must be able to read it, nobody else.
if [[ ${#create[@]} -gt 0 ]] && [[ $(id -u) -eq 0 ]] && getent group mosquitto >/dev/null; then
    chgrp mosquitto "$pwfile"
    chmod 0640 "$pwfile"
fi

if [[ $generate -eq 1 ]]; then
    printf '%s\n' "$password"
fi
if [[ $replace -eq 1 ]]; then
    echo "add-site.sh: new password for site '$site' in $pwfile; now: systemctl reload mosquitto" >&2
else
    echo "add-site.sh: site '$site' added to $pwfile; now: systemctl reload mosquitto" >&2
fi
