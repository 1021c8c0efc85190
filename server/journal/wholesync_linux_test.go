package journal

import "testing"

// TestSyncfsReportsErrors: syncfs reports writeback errors from Linux 5.8
// on (the kernel commit 735e4ae5ba28, from memory; syncfs(2), ERRORS).
func TestSyncfsReportsErrors(t *testing.T) {
	for rel, want := range map[string]bool{
		"5.8.0": true, "5.15.0-91-generic": true, "6.18.44-fc-v1045": true, "10.0": true,
		"5.7.19": false, "4.19.0-25-amd64": false, "3.10.0-1160.el7.x86_64": false, "": false, "linux": false,
	} {
		if got := syncfsReportsErrors(rel); got != want {
			t.Errorf("%q: %v, want %v", rel, got, want)
		}
	}
}
