package api

import (
	"io"
	"net/http"
	"strconv"

	"github.com/labstack/echo/v4"
	"github.com/labstack/echo/v4/middleware"
)

// The benchmark harness (go run ./bench) measures POST /v1/predict against
// the same HTTP stack doing no work; echo is imported only in this package,
// so the floor lives here, apart from the service's handlers.

// FloorHandler is the floor of the http-predict benchmark: the same echo
// setup as the service (recover, body limit, JSON errors) with one route,
// POST /v1/predict, answering a constant body of the size of a real answer.
func FloorHandler() http.Handler {
	e := echo.New()
	e.HideBanner, e.HidePort = true, true
	e.Use(middleware.Recover())
	e.Use(middleware.BodyLimit(strconv.FormatInt(DefaultBodyLimit, 10) + "B"))
	body := []byte(`{"learner":"rls:forget=0.99","checkpoint_version":3,"events_applied":12000,"key":"room-b","prediction":24.4,` +
		`"interval":{"low":22.4,"high":26.4},"recent_rmse":1.02,"events_trained":4000,"events_scored":3990,"caution":"` + caution + `"}`)
	e.POST("/v1/predict", func(c echo.Context) error {
		io.Copy(io.Discard, c.Request().Body)
		return c.Blob(http.StatusOK, echo.MIMEApplicationJSON, body)
	})
	return e
}
