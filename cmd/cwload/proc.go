package main

import (
	"bytes"
	"errors"
	"fmt"
	"os"
	"strconv"
	"strings"
	"sync"
	"syscall"
	"time"
)

// userHZ is the unit of the CPU times in /proc: USER_HZ, 100 on Linux for
// every architecture the kernel exposes to user space (proc(5)).
const userHZ = 100

// cpuTimes are CPU times used: by the host (busy time summed over all
// CPUs), the daemon, this process, and the PostgreSQL backends serving the
// harness's databases. Host time also holds PostgreSQL's shared background
// processes and whatever else runs on the machine.
type cpuTimes struct {
	host, daemon, self, postgres time.Duration
}

// other is the host's busy time not spent by the daemon, the harness or
// its backends.
func (t cpuTimes) other() time.Duration { return t.host - t.daemon - t.self - t.postgres }

// cpuSnapshot holds cumulative CPU times at one moment.
type cpuSnapshot struct {
	host, daemon, self time.Duration
	// backends maps backend pids to their CPU time.
	backends map[int]time.Duration
}

// readCPU reads the CPU times of the host, of pid (0: no daemon), of this
// process and of the backends.
func readCPU(pid int, backends []int) (cpuSnapshot, error) {
	s := cpuSnapshot{backends: map[int]time.Duration{}}
	var err error
	if s.host, err = hostBusy(); err != nil {
		return s, err
	}
	if pid > 0 {
		if s.daemon, err = processCPU(pid); err != nil {
			return s, err
		}
	}
	for _, b := range backends {
		// A backend may have ended since it was listed.
		if t, err := processCPU(b); err == nil {
			s.backends[b] = t
		}
	}
	var ru syscall.Rusage
	if err := syscall.Getrusage(syscall.RUSAGE_SELF, &ru); err != nil {
		return s, fmt.Errorf("read own CPU time: %w", err)
	}
	s.self = time.Duration(ru.Utime.Nano() + ru.Stime.Nano())
	return s, nil
}

// since returns the CPU used from u to s. A backend that started in
// between counts in full; one that ended in between is lost.
func (s cpuSnapshot) since(u cpuSnapshot) cpuTimes {
	t := cpuTimes{host: s.host - u.host, daemon: s.daemon - u.daemon, self: s.self - u.self}
	for pid, cpu := range s.backends {
		t.postgres += cpu - u.backends[pid]
	}
	return t
}

// hostBusy is the non-idle time of all CPUs from the first line of
// /proc/stat: user nice system idle iowait irq softirq steal ...
func hostBusy() (time.Duration, error) {
	data, err := os.ReadFile("/proc/stat")
	if err != nil {
		return 0, fmt.Errorf("read host CPU time: %w", err)
	}
	line, _, _ := bytes.Cut(data, []byte("\n"))
	f := strings.Fields(string(line))
	if len(f) < 9 || f[0] != "cpu" {
		return 0, fmt.Errorf("read host CPU time: unexpected /proc/stat line %q", line)
	}
	var busy int64
	for i, s := range f[1:9] {
		v, err := strconv.ParseInt(s, 10, 64)
		if err != nil {
			return 0, fmt.Errorf("read host CPU time: %w", err)
		}
		if i != 3 && i != 4 { // idle, iowait
			busy += v
		}
	}
	return ticks(busy), nil
}

// processCPU is utime + stime of process pid, fields 14 and 15 of /proc/pid/stat.
func processCPU(pid int) (time.Duration, error) {
	data, err := os.ReadFile(fmt.Sprintf("/proc/%d/stat", pid))
	if err != nil {
		return 0, fmt.Errorf("read process CPU time: %w", err)
	}
	// The command name (field 2) is in parentheses and may hold spaces.
	i := bytes.LastIndexByte(data, ')')
	f := strings.Fields(string(data[i+1:]))
	if len(f) < 13 {
		return 0, fmt.Errorf("read process CPU time: short /proc/%d/stat", pid)
	}
	utime, err1 := strconv.ParseInt(f[11], 10, 64)
	stime, err2 := strconv.ParseInt(f[12], 10, 64)
	if err1 != nil || err2 != nil {
		return 0, fmt.Errorf("read process CPU time: bad /proc/%d/stat", pid)
	}
	return ticks(utime + stime), nil
}

// loadAverage is the host's 1-minute load average.
func loadAverage() (float64, error) {
	data, err := os.ReadFile("/proc/loadavg")
	if err != nil {
		return 0, fmt.Errorf("read load average: %w", err)
	}
	f := strings.Fields(string(data))
	if len(f) == 0 {
		return 0, errors.New("read load average: empty /proc/loadavg")
	}
	v, err := strconv.ParseFloat(f[0], 64)
	if err != nil {
		return 0, fmt.Errorf("read load average: %w", err)
	}
	return v, nil
}

func ticks(n int64) time.Duration { return time.Duration(n) * time.Second / userHZ }

// memory reads VmRSS and VmHWM (the peak RSS the kernel saw) of pid, in
// bytes, from /proc/pid/status.
func memory(pid int) (rss, hwm int64, err error) {
	data, err := os.ReadFile(fmt.Sprintf("/proc/%d/status", pid))
	if err != nil {
		return 0, 0, fmt.Errorf("read daemon memory: %w", err)
	}
	for line := range strings.SplitSeq(string(data), "\n") {
		key, val, ok := strings.Cut(line, ":")
		if !ok || (key != "VmRSS" && key != "VmHWM") {
			continue
		}
		kb, err := strconv.ParseInt(strings.TrimSuffix(strings.TrimSpace(val), " kB"), 10, 64)
		if err != nil {
			return 0, 0, fmt.Errorf("read daemon memory: %s: %w", key, err)
		}
		if key == "VmRSS" {
			rss = kb << 10
		} else {
			hwm = kb << 10
		}
	}
	return rss, hwm, nil
}

// rssSampler reads a process's RSS every interval until stopped, so that
// each phase can report the peak it saw.
type rssSampler struct {
	pid  int
	stop chan struct{}
	done chan struct{}

	mu      sync.Mutex
	samples []rssSample
	err     error
}

type rssSample struct {
	at  time.Time
	rss int64
}

// sampleRSS starts sampling pid every interval.
func sampleRSS(pid int, interval time.Duration) *rssSampler {
	s := &rssSampler{pid: pid, stop: make(chan struct{}), done: make(chan struct{})}
	go func() {
		defer close(s.done)
		t := time.NewTicker(interval)
		defer t.Stop()
		for {
			s.sample()
			select {
			case <-s.stop:
				return
			case <-t.C:
			}
		}
	}()
	return s
}

func (s *rssSampler) sample() {
	rss, _, err := memory(s.pid)
	s.mu.Lock()
	defer s.mu.Unlock()
	if err != nil {
		if s.err == nil {
			s.err = err
		}
		return
	}
	s.samples = append(s.samples, rssSample{time.Now(), rss})
}

// peak returns the largest RSS sampled in [from, to].
func (s *rssSampler) peak(from, to time.Time) int64 {
	s.mu.Lock()
	defer s.mu.Unlock()
	var p int64
	for _, x := range s.samples {
		if !x.at.Before(from) && !x.at.After(to) {
			p = max(p, x.rss)
		}
	}
	return p
}

// close stops sampling and returns the first read error.
func (s *rssSampler) close() error {
	close(s.stop)
	<-s.done
	s.mu.Lock()
	defer s.mu.Unlock()
	return s.err
}
