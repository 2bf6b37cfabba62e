package main

// The deployable image (Dockerfile) cannot be built here: base images cannot
// be pulled. This test assembles the same runtime stage from scratch with
// buildah (Debian's package) from a binary built as the Dockerfile builds
// it, then checks the committed image's config and runs it with podman.
// Storage lives under t.TempDir(), so nothing outside the test is touched.

import (
	"archive/tar"
	"bytes"
	"encoding/json"
	"fmt"
	"os"
	"os/exec"
	"path/filepath"
	"strings"
	"testing"

	"hindcast/pipeline"
)

// imageTool finds buildah or podman; with CI set a missing tool fails the
// test (.ci/run installs both), otherwise the test skips.
func imageTool(t *testing.T, name string) string {
	t.Helper()
	for _, p := range []string{"/usr/bin/" + name, name} {
		if path, err := exec.LookPath(p); err == nil {
			return path
		}
	}
	if os.Getenv("CI") != "" {
		t.Fatalf("%s not found; CI installs Debian's %s package (apt-get install -y buildah podman)", name, name)
	}
	t.Skipf("%s not found (apt-get install -y %s)", name, name)
	return ""
}

func TestImageAssembledFromScratch(t *testing.T) {
	if testing.Short() {
		t.Skip("builds the binary and an image")
	}
	buildah := imageTool(t, "buildah")
	podman := imageTool(t, "podman")
	dir := t.TempDir()
	// Storage flags shared by buildah and podman: vfs needs no overlay
	// support in the kernel; root and runroot keep the test hermetic.
	// podman refuses a runroot longer than 50 characters, which
	// t.TempDir() paths exceed: the runroot gets a short folder of its own.
	runroot, err := os.MkdirTemp("", "hc")
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(func() { os.RemoveAll(runroot) })
	storage := []string{"--root", filepath.Join(dir, "root"), "--runroot", runroot, "--storage-driver", "vfs"}
	must := func(name string, args ...string) string {
		t.Helper()
		cmd := exec.CommandContext(t.Context(), name, args...)
		cmd.Env = append(os.Environ(), "BUILDAH_ISOLATION=chroot")
		var out, errOut bytes.Buffer
		cmd.Stdout, cmd.Stderr = &out, &errOut
		if err := cmd.Run(); err != nil {
			t.Fatalf("%s %s: %v\n%s", filepath.Base(name), strings.Join(args, " "), err, errOut.String())
		}
		return out.String()
	}

	// The binary, as the Dockerfile's build stage makes it: static,
	// trimmed paths, no VCS stamp, version and commit from the linker.
	const version, commit = "0.1.0", "0123456789abcdef0123456789abcdef01234567"
	bin := filepath.Join(dir, "hindcast")
	build := exec.CommandContext(t.Context(), "go", "build", "-trimpath", "-buildvcs=false",
		"-ldflags", "-s -w -X main.buildVersion="+version+" -X main.buildCommit="+commit, "-o", bin, ".")
	build.Env = append(os.Environ(), "CGO_ENABLED=0")
	if out, err := build.CombinedOutput(); err != nil {
		t.Fatalf("go build: %v\n%s", err, out)
	}
	passwd := filepath.Join(dir, "passwd")
	group := filepath.Join(dir, "group")
	tmp := filepath.Join(dir, "tmp")
	if err := os.WriteFile(passwd, []byte("hindcast:x:65532:65532:hindcast:/nonexistent:/sbin/nologin\n"), 0o644); err != nil {
		t.Fatal(err)
	}
	if err := os.WriteFile(group, []byte("hindcast:x:65532:\n"), 0o644); err != nil {
		t.Fatal(err)
	}
	// buildah copy keeps no folder mode, so /tmp (where goals spills its
	// runs) comes in a tar archive, which buildah add unpacks as written.
	var tb bytes.Buffer
	tw := tar.NewWriter(&tb)
	if err := tw.WriteHeader(&tar.Header{Typeflag: tar.TypeDir, Name: "tmp/", Mode: 0o1777}); err != nil {
		t.Fatal(err)
	}
	if err := tw.Close(); err != nil {
		t.Fatal(err)
	}
	tmp += ".tar"
	if err := os.WriteFile(tmp, tb.Bytes(), 0o644); err != nil {
		t.Fatal(err)
	}
	const certs = "/etc/ssl/certs/ca-certificates.crt" // Debian's bundle (ca-certificates package)
	hostCerts, err := os.ReadFile(certs)
	if err != nil {
		t.Fatalf("host CA bundle: %v", err)
	}

	ctr := strings.TrimSpace(must(buildah, append(storage, "from", "scratch")...))
	bah := func(args ...string) string { return must(buildah, append(storage, args...)...) }
	bah("copy", ctr, certs, certs)
	bah("copy", ctr, passwd, "/etc/passwd")
	bah("copy", ctr, group, "/etc/group")
	bah("add", ctr, tmp, "/")
	bah("copy", ctr, bin, "/hindcast")
	bah("config", "--entrypoint", `["/hindcast"]`, "--user", "65532:65532",
		"--label", "org.opencontainers.image.title=hindcast",
		"--label", "org.opencontainers.image.version="+version,
		"--label", "org.opencontainers.image.revision="+commit,
		"--label", "org.opencontainers.image.source=https://git.larkspur.example/data/hindcast",
		ctr)
	const image = "localhost/hindcast:test"
	bah("commit", ctr, image)

	// The image's config (OCI image spec, config fields Entrypoint, User,
	// Labels).
	var info struct {
		OCIv1 struct {
			Config struct {
				Entrypoint []string
				User       string
				Labels     map[string]string
			} `json:"config"`
		}
	}
	if err := json.Unmarshal([]byte(bah("inspect", "--type", "image", image)), &info); err != nil {
		t.Fatalf("buildah inspect: %v", err)
	}
	cfg := info.OCIv1.Config
	if len(cfg.Entrypoint) != 1 || cfg.Entrypoint[0] != "/hindcast" {
		t.Errorf("entrypoint %q, want [/hindcast]", cfg.Entrypoint)
	}
	if cfg.User != "65532:65532" {
		t.Errorf("user %q, want 65532:65532 (non-root)", cfg.User)
	}
	for k, want := range map[string]string{
		"org.opencontainers.image.version":  version,
		"org.opencontainers.image.revision": commit,
		"org.opencontainers.image.source":   "https://git.larkspur.example/data/hindcast",
	} {
		if cfg.Labels[k] != want {
			t.Errorf("label %s = %q, want %q", k, cfg.Labels[k], want)
		}
	}

	// The files of the committed image, from a fresh container of it.
	check := strings.TrimSpace(bah("from", image))
	mnt := strings.TrimSpace(bah("mount", check))
	got, err := os.ReadFile(filepath.Join(mnt, certs))
	if err != nil {
		t.Errorf("image has no CA bundle: %v", err)
	} else if !bytes.Equal(got, hostCerts) {
		t.Errorf("image CA bundle: %d bytes, want the host's %d", len(got), len(hostCerts))
	}
	if fi, err := os.Stat(filepath.Join(mnt, "tmp")); err != nil || fi.Mode().Perm() != 0o777 || fi.Mode()&os.ModeSticky == 0 {
		t.Errorf("image /tmp: %v %v, want a 1777 folder", fi, err)
	}
	if pw, err := os.ReadFile(filepath.Join(mnt, "etc/passwd")); err != nil || !strings.HasPrefix(string(pw), "hindcast:x:65532:65532:") {
		t.Errorf("image /etc/passwd: %q %v", pw, err)
	}
	bah("umount", check)

	// Run it: `hindcast version` inside the image. buildah's chroot
	// isolation needs no cgroups or rlimit changes, so it runs here and in CI.
	run := func(name string, args ...string) (string, error) {
		cmd := exec.CommandContext(t.Context(), name, args...)
		var out, errOut bytes.Buffer
		cmd.Stdout, cmd.Stderr = &out, &errOut
		err := cmd.Run()
		if err != nil {
			err = fmt.Errorf("%w: %s", err, strings.TrimSpace(errOut.String()))
		}
		return out.String(), err
	}
	want := "hindcast " + version + "\ncommit " + commit + "\n"
	out := bah("run", "--isolation", "chroot", check, "--", "/hindcast", "version")
	if !strings.HasPrefix(out, want) {
		t.Errorf("buildah run %s /hindcast version:\n%s\nwant it to start with:\n%s", image, out, want)
	}
	bah("rm", "--all")
	// podman runs the image through an OCI runtime (crun), which sets
	// rlimits; a sandbox without CAP_SYS_RESOURCE refuses that. Its outcome
	// is logged, and checked whenever it starts.
	out, err = run(podman, append(storage, "run", "--rm", "--network", "none", "--cgroups", "disabled", image, "version")...)
	switch {
	case err != nil && strings.Contains(err.Error(), "OCI permission denied"):
		t.Logf("podman run not possible on this machine: %v", err)
	case err != nil:
		t.Errorf("podman run %s version: %v", image, err)
	case !strings.HasPrefix(out, want):
		t.Errorf("podman run %s version:\n%s\nwant it to start with:\n%s", image, out, want)
	default:
		t.Logf("podman run %s version: ok", image)
	}
	// vfs layers are removed through the tools, so t.TempDir can clean up.
	run(podman, append(storage, "system", "reset", "--force")...)
}

// TestDockerfileAgreesWithJobs: the image jobs/ runs is the one the
// Dockerfile documents, tagged with the release the binary reports, and the
// Dockerfile builds as image_test assembles (static, trimmed, linker stamps,
// non-root, entrypoint /hindcast).
func TestDockerfileAgreesWithJobs(t *testing.T) {
	b, err := os.ReadFile("Dockerfile")
	if err != nil {
		t.Fatal(err)
	}
	df := string(b)
	name, tag, _ := strings.Cut(jobsImage, ":")
	if tag != pipeline.ToolVersion {
		t.Errorf("jobs/ run %s, tagged %q; want the release %q", jobsImage, tag, pipeline.ToolVersion)
	}
	for _, want := range []string{
		"-t " + name + ":" + tag,
		"ARG VERSION=" + pipeline.ToolVersion + "\n",
		"CGO_ENABLED=0 go build -trimpath -buildvcs=false",
		"-X main.buildVersion=${VERSION} -X main.buildCommit=${COMMIT}",
		"\nFROM scratch\n",
		"COPY --from=build /etc/ssl/certs/ca-certificates.crt /etc/ssl/certs/ca-certificates.crt\n",
		"\nUSER 65532:65532\n",
		`ENTRYPOINT ["/hindcast"]`,
		`org.opencontainers.image.version="${VERSION}"`,
		`org.opencontainers.image.source="https://git.larkspur.example/data/hindcast"`,
	} {
		if !strings.Contains(df, want) {
			t.Errorf("Dockerfile lacks %q", want)
		}
	}
}
