#!/usr/bin/env bash
# A single-node Slurm on localhost for tests: `slurm-local.sh start DIR` writes
# DIR/slurm.conf, starts MUNGE, the controller and the node daemon (all by
# hand, no systemd) and prints `export SLURM_CONF=...`; `slurm-local.sh stop
# DIR` stops what it started. Needs root and Debian's slurmctld, slurmd,
# slurm-client and munge packages (installed when missing).
set -euo pipefail
cmd="${1:?usage: slurm-local.sh start|stop DIR}"
dir="$(mkdir -p "${2:?usage: slurm-local.sh start|stop DIR}" && cd "$2" && pwd)"
host="$(hostname -s)"

stop() {
    for f in slurmd slurmctld munged; do
        if [ -f "$dir/$f.pid" ]; then
            kill "$(cat "$dir/$f.pid")" 2>/dev/null || true
            rm -f "$dir/$f.pid"
        fi
    done
}

if [ "$cmd" = stop ]; then
    stop
    exit 0
fi

if [ "$(id -u)" -ne 0 ]; then
    echo "slurm-local: needs root to start munged, slurmctld and slurmd" >&2
    exit 77
fi
missing=()
for p in slurmctld slurmd slurm-client munge; do
    dpkg-query -W -f='${Status}' "$p" 2>/dev/null | grep -q "install ok installed" || missing+=("$p")
done
if [ ${#missing[@]} -gt 0 ]; then
    DEBIAN_FRONTEND=noninteractive apt-get install -y -qq --no-install-recommends "${missing[@]}" >/dev/null
fi

mkdir -p "$dir/state" "$dir/spool" "$dir/log" "$dir/munge"
chown munge:munge "$dir/munge"
[ -s /etc/munge/munge.key ] || /usr/sbin/mungekey --create --force >/dev/null 2>&1 || true
cat > "$dir/slurm.conf" <<CONF
ClusterName=flipswarm-test
SlurmctldHost=$host
SlurmUser=root
SlurmdUser=root
AuthType=auth/munge
CryptoType=crypto/munge
StateSaveLocation=$dir/state
SlurmdSpoolDir=$dir/spool
SlurmctldPidFile=$dir/slurmctld.pid
SlurmdPidFile=$dir/slurmd.pid
SlurmctldLogFile=$dir/log/slurmctld.log
SlurmdLogFile=$dir/log/slurmd.log
ProctrackType=proctrack/pgid
TaskPlugin=task/none
JobAcctGatherType=jobacct_gather/none
AccountingStorageType=accounting_storage/none
SchedulerType=sched/backfill
SelectType=select/cons_tres
SelectTypeParameters=CR_Core
ReturnToService=2
SlurmdParameters=config_overrides
JobRequeue=1
MinJobAge=600
KillWait=5
SlurmctldPort=16817
SlurmdPort=16818
NodeName=$host CPUs=8 State=UNKNOWN
PartitionName=test Nodes=$host Default=YES MaxTime=INFINITE State=UP OverSubscribe=YES
CONF
export SLURM_CONF="$dir/slurm.conf"
sudo_munge() { su -s /bin/sh munge -c "$*"; }
sudo_munge "/usr/sbin/munged --socket=$dir/munge/munge.socket --pid-file=$dir/munge/munged.pid --log-file=$dir/munge/munged.log --seed-file=$dir/munge/munged.seed" 
cp "$dir/munge/munged.pid" "$dir/munged.pid"
# The daemons find MUNGE through its default socket; point it there.
mkdir -p /run/munge && chown munge:munge /run/munge
ln -sf "$dir/munge/munge.socket" /run/munge/munge.socket.2
/usr/sbin/slurmctld -f "$SLURM_CONF"
for _ in $(seq 50); do scontrol ping >/dev/null 2>&1 && break; sleep 0.2; done
/usr/sbin/slurmd -f "$SLURM_CONF"
for _ in $(seq 100); do sinfo -h -o %T 2>/dev/null | grep -q idle && break; sleep 0.2; done
if ! sinfo -h -o %T 2>/dev/null | grep -q idle; then
    echo "slurm-local: the node did not become idle; see $dir/log" >&2
    stop
    exit 1
fi
echo "export SLURM_CONF=$SLURM_CONF"
