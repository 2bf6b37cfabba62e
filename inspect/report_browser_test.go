package inspect

import (
	"bytes"
	"context"
	"encoding/json"
	"errors"
	"html"
	"image/png"
	"io"
	"os"
	"os/exec"
	"path/filepath"
	"regexp"
	"strings"
	"syscall"
	"testing"
	"time"
)

// The report is meant to be opened in a browser, so this test opens it in
// one: headless Chromium (Debian's chromium package, /usr/bin/chromium)
// loads the demo version's report from a file:// URL with the network
// features off, runs the page's own plot check and dumps the DOM; a second
// run takes a screenshot.

// rpTChromium finds the browser; without it the test is skipped, except on
// CI, which installs it and must not pass silently without it.
func rpTChromium(t *testing.T) string {
	t.Helper()
	for _, name := range []string{"/usr/bin/chromium", "chromium"} {
		if p, err := exec.LookPath(name); err == nil {
			return p
		}
	}
	if os.Getenv("CI") != "" {
		t.Fatal("chromium not found; CI installs Debian's chromium package (apt-get install -y chromium)")
	}
	t.Skip("chromium not found (apt-get install -y chromium)")
	return ""
}

// rpTBrowse runs headless Chromium on url with extra flags, bounded by 60 s;
// it returns stdout. Chromium forks helpers, so it runs in its own process
// group and the whole group is killed if the time runs out.
func rpTBrowse(t *testing.T, chromium, url string, extra ...string) []byte {
	t.Helper()
	ctx, cancel := context.WithTimeout(context.Background(), 60*time.Second)
	defer cancel()
	home := t.TempDir()
	args := []string{"--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
		"--disable-background-networking", "--disable-component-update", "--disable-sync",
		"--disable-dev-shm-usage", "--user-data-dir=" + filepath.Join(home, "profile"), "--virtual-time-budget=5000"}
	args = append(append(args, extra...), url)
	cmd := exec.CommandContext(ctx, chromium, args...)
	cmd.Env = append(os.Environ(), "HOME="+home, "XDG_CONFIG_HOME="+filepath.Join(home, "config"), "XDG_CACHE_HOME="+filepath.Join(home, "cache"))
	cmd.SysProcAttr = &syscall.SysProcAttr{Setpgid: true}
	cmd.Cancel = func() error { return syscall.Kill(-cmd.Process.Pid, syscall.SIGKILL) }
	cmd.WaitDelay = 5 * time.Second
	var stdout, stderr bytes.Buffer
	cmd.Stdout, cmd.Stderr = &stdout, &stderr
	err := cmd.Run()
	if errors.Is(ctx.Err(), context.DeadlineExceeded) {
		t.Fatalf("chromium ran past 60 s; stderr:\n%s", rpTTail(stderr.String()))
	}
	if err != nil {
		t.Fatalf("chromium %s: %v; stderr:\n%s", strings.Join(extra, " "), err, rpTTail(stderr.String()))
	}
	return stdout.Bytes()
}

func rpTTail(s string) string {
	if len(s) > 3000 {
		return "…" + s[len(s)-3000:]
	}
	return s
}

var (
	rpTCheckRe    = regexp.MustCompile(`(?s)<pre id="plot-check"[^>]*>(.*?)</pre>`)
	rpTDataPlotRe = regexp.MustCompile(`<svg class="plot" data-plot="`)
)

func TestReportBrowser(t *testing.T) {
	chromium := rpTChromium(t)
	dir := t.TempDir()
	v := rpTDemo(t)
	page := rpTReport(t, v)
	path := filepath.Join(dir, "report.html")
	if err := os.WriteFile(path, []byte(page), 0o644); err != nil {
		t.Fatal(err)
	}
	url := "file://" + path
	want := len(rpTDataPlotRe.FindAllString(page, -1))
	if want == 0 {
		t.Fatal("the report has no plot")
	}

	dom := rpTBrowse(t, chromium, url, "--dump-dom")
	m := rpTCheckRe.FindSubmatch(dom)
	if m == nil {
		t.Fatalf("no #plot-check in the dumped DOM (%d bytes)", len(dom))
	}
	var check struct {
		Plots  int      `json:"plots"`
		OK     int      `json:"ok"`
		Failed []string `json:"failed"`
	}
	text := html.UnescapeString(string(m[1]))
	if err := json.Unmarshal([]byte(text), &check); err != nil {
		t.Fatalf("#plot-check holds %q, not the check's JSON (did the script run?): %v", text, err)
	}
	if check.Plots != want || check.OK != want || len(check.Failed) != 0 || check.Failed == nil {
		t.Errorf("plot check %s, want %d plots, all %d ok, failed []", text, want, want)
	}

	shot := filepath.Join(dir, "report.png")
	rpTBrowse(t, chromium, url, "--screenshot="+shot, "--window-size=1280,4000", "--hide-scrollbars")
	info, err := os.Stat(shot)
	if err != nil {
		t.Fatalf("no screenshot: %v", err)
	}
	// A blank 1280×4000 PNG compresses to a few KB; the page's text and
	// plots make it far larger.
	if info.Size() <= 20<<10 {
		t.Errorf("screenshot is %d bytes, want > 20 KB", info.Size())
	}
	f, err := os.Open(shot)
	if err != nil {
		t.Fatal(err)
	}
	defer f.Close()
	img, err := png.Decode(f)
	if err != nil {
		t.Fatalf("screenshot does not decode as PNG: %v", err)
	}
	if b := img.Bounds(); b.Dx() != 1280 || b.Dy() != 4000 {
		t.Errorf("screenshot is %dx%d, want 1280x4000", b.Dx(), b.Dy())
	}
	// HINDCAST_REPORT_SHOT names a file, or a folder to put report.png in.
	if out := os.Getenv("HINDCAST_REPORT_SHOT"); out != "" {
		if st, err := os.Stat(out); err == nil && st.IsDir() {
			out = filepath.Join(out, "report.png")
		}
		if err := rpTCopy(shot, out); err != nil {
			t.Errorf("copying the screenshot to %s: %v", out, err)
		}
	}
}

func rpTCopy(from, to string) error {
	src, err := os.Open(from)
	if err != nil {
		return err
	}
	defer src.Close()
	dst, err := os.Create(to)
	if err != nil {
		return err
	}
	if _, err := io.Copy(dst, src); err != nil {
		dst.Close()
		return err
	}
	return dst.Close()
}
