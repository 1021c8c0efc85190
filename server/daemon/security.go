package daemon

import (
	"crypto/tls"
	"crypto/x509"
	"fmt"
	"log/slog"
	"net"
	"time"
)

// loopbackAddr tells whether a listen address ("host:port") binds to this
// machine only: "localhost" or a loopback IP. An empty host or an
// unspecified IP (0.0.0.0, ::) binds every interface.
func loopbackAddr(addr string) bool {
	host, _, err := net.SplitHostPort(addr)
	if err != nil {
		return false
	}
	if host == "localhost" {
		return true
	}
	ip := net.ParseIP(host)
	return ip != nil && ip.IsLoopback()
}

// checkExposure refuses to serve off loopback without protection: the gRPC
// listener needs TLS or Insecure, the metrics listener (which has no TLS)
// needs Insecure, and the live view needs TLS with a token or client
// certificates (it shows where the robots are, and a token must not travel
// in plain text), or Insecure. A metrics or view address without a host
// binds loopback.
func checkExposure(dc *Config) error {
	if !loopbackAddr(dc.Listen) && dc.TLSCert == "" && !dc.Insecure {
		return fmt.Errorf("listen %s is not a loopback address: serving it needs TLS (-tls-cert and -tls-key) or -insecure to serve in plain text", dc.Listen)
	}
	if dc.MetricsListen != "" {
		dc.MetricsListen = hostOrLoopback(dc.MetricsListen)
		if !loopbackAddr(dc.MetricsListen) && !dc.Insecure {
			return fmt.Errorf("metrics-listen %s is not a loopback address: metrics are served in plain text, which needs -insecure", dc.MetricsListen)
		}
	}
	if dc.ViewListen != "" {
		dc.ViewListen = hostOrLoopback(dc.ViewListen)
		guarded := dc.TLSCert != "" && (dc.Token != "" || dc.TLSClientCA != "")
		if !loopbackAddr(dc.ViewListen) && !guarded && !dc.Insecure {
			return fmt.Errorf("view %s is not a loopback address: the live view shows where the robots are, so serving it needs TLS (-tls-cert and -tls-key) with -token-file or -tls-client-ca, or -insecure to serve it anyway", dc.ViewListen)
		}
	}
	return nil
}

// hostOrLoopback returns addr with an empty host (":PORT") made loopback.
func hostOrLoopback(addr string) string {
	if host, port, err := net.SplitHostPort(addr); err == nil && host == "" {
		return net.JoinHostPort("127.0.0.1", port)
	}
	return addr
}

// expiryWarning is how long before its end a certificate is reported.
const expiryWarning = 30 * 24 * time.Hour

// logCertExpiry logs a server certificate that has expired or expires
// within expiryWarning of now.
func logCertExpiry(log *slog.Logger, tc *tls.Config, now time.Time) {
	for _, c := range tc.Certificates {
		leaf := c.Leaf
		if leaf == nil && len(c.Certificate) > 0 {
			leaf, _ = x509.ParseCertificate(c.Certificate[0])
		}
		if leaf == nil {
			continue
		}
		switch left := leaf.NotAfter.Sub(now); {
		case left <= 0:
			log.Error("server certificate has expired", "subject", leaf.Subject.String(), "not_after", leaf.NotAfter)
		case left < expiryWarning:
			log.Warn("server certificate expires soon", "subject", leaf.Subject.String(), "not_after", leaf.NotAfter, "days_left", int(left.Hours()/24))
		}
	}
}
