package main

import (
	"fmt"
	"os"
	"path/filepath"
	"strings"
	"testing"

	"hindcast/internal/s3test"
)

// TestS3CredentialsRefusedCLI: `hindcast run` and `hindcast verify` with a
// wrong access key or a wrong secret say the credentials were refused, not
// that the source or the version is not there (versitygw v1.8.0 answers an
// unknown access key with 404 XAdminUserNotFound: measured), and exit 1.
func TestS3CredentialsRefusedCLI(t *testing.T) {
	const bucket = "hc-creds-cli"
	srv := s3test.Start(t, bucket)
	s3SetEnv(t, srv)
	c := srv.Client()
	dir := t.TempDir()
	logs := filepath.Join(dir, "logs")
	s3WriteCorpus(t, logs)
	s3Upload(t, c, bucket, logs, "logs/")
	cfg := filepath.Join(dir, "c.yaml")
	yaml := fmt.Sprintf(s3CorpusYAML, "s3://"+bucket+"/logs/", "s3://"+bucket+"/work/", "s3://"+bucket+"/out/",
		"storage:\n  endpoint: "+srv.Endpoint+"\n")
	if err := os.WriteFile(cfg, []byte(yaml), 0o644); err != nil {
		t.Fatal(err)
	}
	s3MustRun(t, srv.SecretKey, "run", "--config", cfg, "--version", "v1")
	version := "s3://" + bucket + "/out/s3-faults/v1/"

	for _, k := range []struct{ name, access, secret string }{
		{"WrongAccessKey", "not-a-known-access-key", srv.SecretKey},
		{"WrongSecret", srv.AccessKey, "not-the-secret-at-all-0123456789"},
	} {
		t.Run(k.name, func(t *testing.T) {
			t.Setenv("AWS_ACCESS_KEY_ID", k.access)
			t.Setenv("AWS_SECRET_ACCESS_KEY", k.secret)
			t.Setenv("AWS_ENDPOINT_URL_S3", srv.Endpoint) // for verify, which has no config
			for _, args := range [][]string{
				{"run", "--config", cfg, "--version", "v2"},
				{"verify", version},
			} {
				code, _, errOut := s3Run(args...)
				s3NoSecret(t, k.secret, "stderr", errOut)
				if code != exitRuntime || !strings.Contains(errOut, "credentials refused") || strings.Contains(errOut, ": not found") {
					t.Errorf("hindcast %s: exit %d, want 1 saying the credentials were refused (and not \"not found\"):\n%s",
						strings.Join(args, " "), code, clTail(errOut, 2000))
				}
			}
		})
	}
}
