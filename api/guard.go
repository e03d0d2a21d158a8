package api

import (
	"mime"
	"net"
	"net/http"
	"net/url"
	"slices"
	"strings"

	"github.com/labstack/echo/v4"
)

// Guards against requests a web page in an operator's browser can make.
// A page of another site can post a form (Content-Type text/plain,
// application/x-www-form-urlencoded or multipart/form-data) to any address
// the browser reaches, and with DNS rebinding can even read answers under
// its own host name. So:
//
//   - every request must be addressed (Host) to an IP address, to localhost,
//     or to a name in Config.AllowedHosts: a rebinding page's Host is its own
//     name;
//   - a changing request that carries an Origin must come from the service's
//     own origin or one in Config.AllowedOrigins (browsers send Origin with
//     every cross-site POST; tools such as curl send none);
//   - a changing request's body must be declared JSON (or NDJSON for events):
//     no form can send those types without a CORS preflight, which this
//     service never grants;
//   - bodies are decoded strictly: data after the JSON object is refused.

// checkHost refuses a request whose Host names a host this service does not
// answer to.
func (s *Service) checkHost(next echo.HandlerFunc) echo.HandlerFunc {
	return func(c echo.Context) error {
		host := c.Request().Host
		if h, _, err := net.SplitHostPort(host); err == nil {
			host = h
		}
		host = strings.TrimSuffix(strings.TrimPrefix(host, "["), "]")
		if host == "" || net.ParseIP(host) != nil || strings.EqualFold(host, "localhost") ||
			slices.ContainsFunc(s.cfg.AllowedHosts, func(a string) bool { return strings.EqualFold(a, host) }) {
			return next(c)
		}
		return httpErr(http.StatusForbidden, "this service does not answer to host %q; address it by IP or localhost, "+
			"or start it with --allowed-host %s (a guard against DNS rebinding)", truncateText(host, 100), truncateText(host, 100))
	}
}

// sameOrigin refuses a changing request sent by a web page of another site.
func (s *Service) sameOrigin(next echo.HandlerFunc) echo.HandlerFunc {
	return func(c echo.Context) error {
		origin := c.Request().Header.Get("Origin")
		if origin == "" {
			return next(c)
		}
		if u, err := url.Parse(origin); err == nil && u.Host != "" && strings.EqualFold(u.Host, c.Request().Host) {
			return next(c)
		}
		if slices.ContainsFunc(s.cfg.AllowedOrigins, func(a string) bool { return strings.EqualFold(strings.TrimSuffix(a, "/"), origin) }) {
			return next(c)
		}
		return httpErr(http.StatusForbidden, "changing requests from web pages of other sites are refused (Origin %q); "+
			"allow a trusted page's origin with --allowed-origin", truncateText(origin, 100))
	}
}

// Media types a changing request may declare.
var (
	jsonTypes   = []string{"application/json"}
	eventsTypes = []string{"application/x-ndjson", "application/json", "application/ndjson"}
)

// requireType refuses a body whose Content-Type is none of types with 415.
// A request without a body and without a Content-Type passes (POST
// /v1/checkpoints from curl -X POST); a form always declares its type.
func requireType(types ...string) echo.MiddlewareFunc {
	return func(next echo.HandlerFunc) echo.HandlerFunc {
		return func(c echo.Context) error {
			req := c.Request()
			ct := req.Header.Get("Content-Type")
			if ct == "" && (req.ContentLength == 0 || req.Body == nil || req.Body == http.NoBody) {
				return next(c)
			}
			mt, _, err := mime.ParseMediaType(ct)
			if err == nil && slices.Contains(types, strings.ToLower(mt)) {
				return next(c)
			}
			return httpErr(http.StatusUnsupportedMediaType, "Content-Type %q is not accepted here; send %s (with curl: -H 'Content-Type: %s')",
				truncateText(ct, 100), strings.Join(types, " or "), types[0])
		}
	}
}

func truncateText(s string, n int) string {
	if len(s) <= n {
		return s
	}
	return s[:n] + "…"
}
