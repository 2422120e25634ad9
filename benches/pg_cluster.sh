# Shared by the benchmark scripts that need PostgreSQL (sourced, not run): a throwaway cluster
# from Debian's postgresql, run as the `postgres` user when the script runs as root, on a unix
# socket only, `fsync` and `synchronous_commit` on as in production; and CPU readings from
# /proc for a process and for the postmaster with all its children.
#
#   source benches/pg_cluster.sh
#   pg_cluster_start understudy-NAME     # sets pgbin, pgroot, postmaster, pg_conninfo
#   pg_cluster_stop                      # call from the script's EXIT trap
#   service_config PATH PORT DATA BACKEND URL_ENV   # a bench service's config from `init`

pgbin=$(ls -d /usr/lib/postgresql/*/bin 2>/dev/null | sort -V | tail -1)
[ -n "$pgbin" ] || { echo "Debian's postgresql is needed" >&2; exit 1; }

if [ "$(id -u)" -eq 0 ]; then
  as_pg() { runuser -u postgres -- "$@"; }
else
  as_pg() { "$@"; }
fi

pg_cluster_start() { # name
  pgroot=$(mktemp -d "/tmp/$1-XXXXXX")
  chmod 0755 "$pgroot"
  [ "$(id -u)" -eq 0 ] && chown postgres:postgres "$pgroot"
  as_pg "$pgbin/initdb" -D "$pgroot/data" -A trust -U postgres >/dev/null
  as_pg "$pgbin/pg_ctl" -D "$pgroot/data" -l "$pgroot/log" -w \
    -o "-k $pgroot -c listen_addresses='' -c fsync=on -c synchronous_commit=on" start >/dev/null
  as_pg "$pgbin/createdb" -h "$pgroot" -U postgres understudy
  postmaster=$(head -1 "$pgroot/data/postmaster.pid")
  pg_conninfo="host=$pgroot user=postgres dbname=understudy"
}

pg_cluster_stop() {
  [ -n "${pgroot:-}" ] || return 0
  as_pg "$pgbin/pg_ctl" -D "$pgroot/data" -m fast stop >/dev/null 2>&1 || true
  rm -rf "$pgroot"
}

# utime + stime of a process, in clock ticks (fields 14 and 15 of its stat).
cpu_of() { sed 's/.*) //' "/proc/$1/stat" | awk '{print $12 + $13}'; }

# The same summed over the postmaster and its children (field 4 of stat is the parent's pid).
pg_cpu() {
  local total=0 stat pid line rest
  for stat in /proc/[0-9]*/stat; do
    pid=${stat#/proc/}; pid=${pid%/stat}
    line=$(cat "$stat" 2>/dev/null) || continue
    rest=${line##*) }
    set -- $rest
    if [ "$pid" = "$postmaster" ] || [ "$2" = "$postmaster" ]; then
      total=$((total + ${12} + ${13}))
    fi
  done
  echo "$total"
}

# A starter config (`understudy init`) edited for a bench service: listen on PORT, keep data
# in DATA, runs only on request; with BACKEND postgres, the store from the URL in $URL_ENV.
service_config() { # path port data backend url_env
  python3 - "$@" <<'PY'
import re, sys
path, port, data, backend, url_env = sys.argv[1:]
text = open(path).read()
text = re.sub(r'(?m)^listen = .*$', f'listen = "127.0.0.1:{port}"', text, count=1)
text = re.sub(r'(?m)^data_dir = .*$', f'data_dir = "{data}"', text, count=1)
text = re.sub(r'(?m)^every = .*$', '', text, count=1)
text = re.sub(r'(?m)^new_labels = .*$', '', text, count=1)
if backend == "postgres":
    text += f'\n[store]\nbackend = "postgres"\nurl_env = "{url_env}"\npool_size = 16\n'
open(path, "w").write(text)
PY
}
