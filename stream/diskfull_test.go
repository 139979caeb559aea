//go:build linux

package stream

import (
	"context"
	"errors"
	"os"
	"path/filepath"
	"strconv"
	"strings"
	"syscall"
	"testing"
	"time"

	"github.com/prometheus/client_golang/prometheus/testutil"
)

// mountTmpfs mounts a tmpfs of size bytes at a new directory and
// unmounts it when the test ends. Mounting needs root (CAP_SYS_ADMIN);
// without it the test is skipped with the reason.
func mountTmpfs(t *testing.T, size int) string {
	t.Helper()
	dir := filepath.Join(t.TempDir(), "mnt")
	if err := os.Mkdir(dir, 0o700); err != nil {
		t.Fatal(err)
	}
	if err := syscall.Mount("tmpfs", dir, "tmpfs", 0, "size="+strconv.Itoa(size)); err != nil {
		if errors.Is(err, syscall.EPERM) {
			t.Skipf("mounting a tmpfs needs root: %v", err)
		}
		t.Fatalf("mount tmpfs at %s: %v", dir, err)
	}
	t.Cleanup(func() {
		if err := syscall.Unmount(dir, 0); err != nil {
			t.Errorf("unmount %s: %v", dir, err)
		}
	})
	return dir
}

// TestServiceDiskFull puts the state file on a small tmpfs and fills the
// rest: the service must stop acking, report not-ready with the reason
// and count the failed commits; once the filler is removed it must carry
// on and end exactly where a run on a roomy disk ends.
func TestServiceDiskFull(t *testing.T) {
	ctx, cancel := context.WithTimeout(context.Background(), 90*time.Second)
	defer cancel()
	mnt := mountTmpfs(t, 8<<20)
	e := startTestServer(t)
	_, js := connectTest(t, e.ClientURL())
	base := testServiceConfig()
	ensureStreams(t, ctx, js, base)
	cereal := newTestCategory("breakfast-cereal", 40, 1001, 41)
	tea := newTestCategory("tea", 24, 3001, 42)
	last := publishInput(t, ctx, js, crashInput(cereal, tea))
	lg := newTestLog(t)

	refCfg := withTag(base, "ref")
	refPath := filepath.Join(t.TempDir(), "ref.db")
	ref := startInstance(t, e.ClientURL(), refPath, refCfg, lg, instanceOptions{})
	if stopped, err := ref.waitDone(ctx, last, nil); stopped {
		t.Fatalf("reference run stopped: %v", err)
	}
	if err := ref.stop(); err != nil {
		t.Fatal(err)
	}
	want := collectRun(t, ctx, js, refCfg, refPath, cereal, tea)

	cfg := withTag(base, "full")
	path := filepath.Join(mnt, "rivalmix.db")
	in := startInstance(t, e.ClientURL(), path, cfg, lg, instanceOptions{manual: true})
	// Leave 96 KiB free beside the new state file.
	var st syscall.Statfs_t
	if err := syscall.Statfs(mnt, &st); err != nil {
		t.Fatal(err)
	}
	free := int64(st.Bavail) * int64(st.Bsize)
	filler := filepath.Join(mnt, "filler")
	if err := os.WriteFile(filler, make([]byte, free-96<<10), 0o600); err != nil {
		t.Fatalf("filler: %v", err)
	}
	in.start()
	failures := in.svc.metrics.commitErr.WithLabelValues("disk_full")
	for testutil.ToFloat64(failures) < 3 {
		if !Sleep(ctx, 20*time.Millisecond) {
			t.Fatalf("no commit failed for a full disk (position %d of %d)", in.position(), last)
		}
		select {
		case err := <-in.runErr:
			t.Fatalf("service stopped instead of waiting for space: %v", err)
		default:
		}
	}
	err := in.svc.Ready()
	if err == nil || !strings.Contains(err.Error(), "disk is full") {
		t.Errorf("Ready while the disk is full: %v, want the reason", err)
	}
	pos := in.position()
	ci := consumerInfo(t, ctx, js, cfg.Bus)
	if ci.AckFloor.Stream > pos {
		t.Errorf("consumer acked input %d while the state file holds %d", ci.AckFloor.Stream, pos)
	}
	if pos >= last {
		t.Fatalf("the whole input (%d) was committed before the disk filled; the test proves nothing", last)
	}
	t.Logf("disk full at input %d of %d; %v commit failures; Ready: %v", pos, last, testutil.ToFloat64(failures), err)
	if err := os.Remove(filler); err != nil {
		t.Fatal(err)
	}
	if stopped, err := in.waitDone(ctx, last, nil); stopped {
		t.Fatalf("service stopped after space returned: %v", err)
	}
	if err := in.stop(); err != nil {
		t.Fatal(err)
	}
	got := collectRun(t, ctx, js, cfg, path, cereal, tea)
	compareRuns(t, "disk full", got, want)
}
