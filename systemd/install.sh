#!/bin/sh
# Installs linewarden as a systemd service, or upgrades an installed one. Safe to run again:
# it never overwrites a config you have edited, and leaves the archive alone.
#
#     cargo build --release
#     sudo systemd/install.sh            # then edit /etc/linewarden/cell.toml
#     sudo systemctl enable --now linewarden
#
# What it does, in order:
#   1. the service user and group (default linewarden, in dialout for serial gauges), unless
#      they exist: systemd-sysusers with systemd/linewarden.sysusers, else useradd;
#   2. the binary to /usr/local/bin/linewarden;
#   3. the directories: /etc/linewarden (root, group-readable by the service), and the state
#      directory /var/lib/linewarden with archive/, limits/ (learned limits) and inbox/
#      (owned by the service user, 0750);
#   4. /etc/linewarden/cell.toml from config/cell.toml when there is none; an edited one is
#      kept (only made readable by the service group) and the shipped one is put beside it as
#      cell.toml.example;
#   5. the unit to /etc/systemd/system/linewarden.service, and systemctl daemon-reload when
#      systemd runs here.
#
# Options:
#   --root DIR      install under DIR instead of / (a package or an image); the user and
#                   group must exist on this machine (for the ownership), and systemctl is
#                   not called
#   --binary FILE   the linewarden binary (default: target/release/linewarden of this checkout)
#   --config FILE   the starting config (default: config/cell.toml of this checkout)
#   --user NAME     the service user (default linewarden); --group NAME its group (default:
#                   the same name)
#
# SAFETY: linewarden's alerts, stack light and stop-line signals are advisory process signals,
# not safety functions. Never wire them in place of an emergency stop or a safety-rated
# circuit; follow local electrical codes and the machine's safety standards (ISO 13849,
# IEC 60204-1), and have relays wired by a qualified electrician.
set -eu

here=$(cd "$(dirname "$0")" && pwd)
checkout=$(dirname "$here")
root=/
binary="$checkout/target/release/linewarden"
config="$checkout/config/cell.toml"
user=linewarden
group=

say() { printf 'install: %s\n' "$*"; }
die() { printf 'install: error: %s\n' "$*" >&2; exit 1; }

while [ $# -gt 0 ]; do
    case "$1" in
        --root) [ $# -ge 2 ] || die "--root needs a directory"; root=$2; shift 2 ;;
        --binary) [ $# -ge 2 ] || die "--binary needs a file"; binary=$2; shift 2 ;;
        --config) [ $# -ge 2 ] || die "--config needs a file"; config=$2; shift 2 ;;
        --user) [ $# -ge 2 ] || die "--user needs a name"; user=$2; shift 2 ;;
        --group) [ $# -ge 2 ] || die "--group needs a name"; group=$2; shift 2 ;;
        -h|--help) sed -n '2,33p' "$0" | sed 's/^# \{0,1\}//'; exit 0 ;;
        *) die "unknown option \"$1\" (see --help)" ;;
    esac
done
[ -n "$group" ] || group=$user
[ "$(id -u)" = 0 ] || die "run as root (sudo $0): it creates a user and sets owners"
[ -f "$binary" ] || die "no binary at $binary: build it first (cargo build --release) or pass --binary FILE"
[ -f "$config" ] || die "no starting config at $config"
[ -d "$root" ] || die "the root $root is not a directory"
r=${root%/}

# 1. The service user and group.
if getent passwd "$user" >/dev/null; then
    say "user $user exists"
elif [ -n "$r" ]; then
    die "user $user does not exist on this machine; with --root, create it first or pass --user NAME"
elif [ "$user" = linewarden ] && command -v systemd-sysusers >/dev/null; then
    install -D -m 0644 "$here/linewarden.sysusers" /etc/sysusers.d/linewarden.conf
    systemd-sysusers /etc/sysusers.d/linewarden.conf
    say "created user $user with systemd-sysusers"
else
    getent group "$group" >/dev/null || groupadd --system "$group"
    useradd --system --gid "$group" --home-dir /var/lib/linewarden --no-create-home \
        --shell /usr/sbin/nologin --comment "linewarden SPC daemon" "$user"
    if getent group dialout >/dev/null; then usermod -a -G dialout "$user"; fi
    say "created user $user with useradd"
fi
getent group "$group" >/dev/null || die "group $group does not exist"
if [ "$user" = linewarden ]; then
    install -D -m 0644 "$here/linewarden.sysusers" "$r/etc/sysusers.d/linewarden.conf"
fi

# 2. The binary (an upgrade replaces it; a running daemon keeps the old one until restarted).
install -D -m 0755 "$binary" "$r/usr/local/bin/linewarden"
say "binary: $r/usr/local/bin/linewarden"

# 3. Directories: the config read-only for the service, the state its own.
[ -z "$r" ] || install -d -m 0755 "$r/etc" "$r/var" "$r/var/lib" "$r/usr/local/bin" \
    "$r/etc/systemd/system"
install -d -m 0750 -o root -g "$group" "$r/etc/linewarden" "$r/etc/linewarden/limits"
for d in "$r/var/lib/linewarden" "$r/var/lib/linewarden/archive" "$r/var/lib/linewarden/limits" \
    "$r/var/lib/linewarden/inbox"; do
    install -d -m 0750 -o "$user" -g "$group" "$d"
done
# Files an engineer put into /etc/linewarden (limits files, a mail password file) must be
# readable by the service group, and by nobody else.
find "$r/etc/linewarden" -exec chgrp "$group" {} + -exec chmod g+rX,o-rwx {} +
say "directories: $r/etc/linewarden (root:$group), $r/var/lib/linewarden (${user}:$group)"

# 4. The config: never overwrite an edited one.
target="$r/etc/linewarden/cell.toml"
if [ ! -e "$target" ]; then
    install -m 0640 -o root -g "$group" "$config" "$target"
    say "config: $target (the starting one: edit it for your cell)"
elif cmp -s "$config" "$target"; then
    say "config: $target unchanged"
else
    install -m 0640 -o root -g "$group" "$config" "$target.example"
    say "config: $target is yours and was kept; the shipped one is $target.example"
fi

# 5. The unit.
install -m 0644 "$here/linewarden.service" "$r/etc/systemd/system/linewarden.service"
say "unit: $r/etc/systemd/system/linewarden.service"
if [ -z "$r" ] && [ -d /run/systemd/system ] && command -v systemctl >/dev/null; then
    systemctl daemon-reload
    if runuser -u "$user" -- "$r/usr/local/bin/linewarden" check --config "$target" >/dev/null; then
        say "the config is valid for user $user; start with: systemctl enable --now linewarden"
    else
        say "fix the config above, then: systemctl enable --now linewarden"
    fi
else
    say "systemd is not managing this root: on the target run systemctl daemon-reload && systemctl enable --now linewarden"
fi
