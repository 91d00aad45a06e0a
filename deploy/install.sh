#!/usr/bin/env bash
# deploy/install.sh - install oddsky as a systemd service, starting nothing.
#
#   deploy/install.sh [--prefix DIR] [--destdir DIR] [--build DIR] [--sysconfdir DIR]
#
#   PREFIX      /usr/local   binary in PREFIX/bin, units and sysusers/tmpfiles
#                            snippets in PREFIX/lib/systemd/system,
#                            PREFIX/lib/sysusers.d, PREFIX/lib/tmpfiles.d
#                            (systemd searches /usr/local/lib as well as /usr/lib),
#                            example config and schemas in PREFIX/share/oddsky
#   SYSCONFDIR  /etc         the live config, SYSCONFDIR/oddsky/oddsky.json,
#                            written from the example only when absent (an
#                            existing config is never overwritten)
#   DESTDIR     (empty)      staging root for packaging; nothing outside it is touched
#   BUILD       build        where `make` left the binary
#
# Options override the environment variables of the same names.  The unit's
# paths are rewritten to PREFIX and SYSCONFDIR.  Afterwards (as root, without
# DESTDIR) the script prints the commands that create the user, the
# directories and enable the service; it runs none of them.
set -euo pipefail
here=$(cd "$(dirname "${BASH_SOURCE[0]}")" && pwd)
top=$(cd "$here/.." && pwd)

PREFIX=${PREFIX:-/usr/local}
SYSCONFDIR=${SYSCONFDIR:-/etc}
DESTDIR=${DESTDIR:-}
BUILD=${BUILD:-build}
while [ $# -gt 0 ]; do
    case "$1" in
        --prefix) PREFIX=$2; shift 2 ;;
        --destdir) DESTDIR=$2; shift 2 ;;
        --build) BUILD=$2; shift 2 ;;
        --sysconfdir) SYSCONFDIR=$2; shift 2 ;;
        -h|--help) sed -n '2,/^set -euo/p' "$0" | sed -e '/^set -euo/d' -e 's/^# \{0,1\}//'; exit 0 ;;
        *) echo "install.sh: unknown argument $1" >&2; exit 64 ;;
    esac
done
case "$BUILD" in /*) ;; *) BUILD="$top/$BUILD" ;; esac
case "$PREFIX" in /*) ;; *) echo "install.sh: PREFIX must be absolute" >&2; exit 64 ;; esac

bin="$BUILD/oddsky"
[ -x "$bin" ] || { echo "install.sh: $bin is missing: run make first" >&2; exit 1; }
example="$top/config/oddsky.example.json"
[ -f "$example" ] || { echo "install.sh: $example is missing" >&2; exit 1; }

root="$DESTDIR"
unitdir="$PREFIX/lib/systemd/system"
sysusersdir="$PREFIX/lib/sysusers.d"
tmpfilesdir="$PREFIX/lib/tmpfiles.d"
sharedir="$PREFIX/share/oddsky"
confdir="$SYSCONFDIR/oddsky"

install -d "$root$PREFIX/bin" "$root$unitdir" "$root$sysusersdir" "$root$tmpfilesdir" \
    "$root$sharedir/schemas" "$root$confdir"
install -m 0755 "$bin" "$root$PREFIX/bin/oddsky"
install -m 0644 "$example" "$root$sharedir/oddsky.example.json"
for f in "$top"/config/schemas/*.avsc; do
    [ -e "$f" ] && install -m 0644 "$f" "$root$sharedir/schemas/"
done

# The unit names /usr/local/bin and /etc/oddsky; follow the chosen paths.
sed -e "s|/usr/local/bin/oddsky|$PREFIX/bin/oddsky|g" \
    -e "s|/etc/oddsky/|$confdir/|g" \
    "$here/oddsky.service" >"$root$unitdir/oddsky.service.tmp"
chmod 0644 "$root$unitdir/oddsky.service.tmp"
mv "$root$unitdir/oddsky.service.tmp" "$root$unitdir/oddsky.service"
install -m 0644 "$here/oddsky.sysusers" "$root$sysusersdir/oddsky.conf"
sed -e "s|/etc/oddsky|$confdir|g" "$here/oddsky.tmpfiles" >"$root$tmpfilesdir/oddsky.conf"
chmod 0644 "$root$tmpfilesdir/oddsky.conf"

if [ -e "$root$confdir/oddsky.json" ]; then
    echo "install.sh: keeping the existing $root$confdir/oddsky.json"
else
    install -m 0640 "$example" "$root$confdir/oddsky.json"
fi

echo "install.sh: installed under ${DESTDIR:-/} (prefix $PREFIX); nothing was started."
if [ -z "$DESTDIR" ]; then
    cat <<EOF
Next steps (as root):
  systemd-sysusers $sysusersdir/oddsky.conf
  systemd-tmpfiles --create $tmpfilesdir/oddsky.conf
  \$EDITOR $confdir/oddsky.json        # kafka.brokers, topics, featmap
  $PREFIX/bin/oddsky check-config $confdir/oddsky.json
  systemctl daemon-reload && systemctl enable --now oddsky
EOF
fi
