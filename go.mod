module tidemark

go 1.26

require (
	github.com/klauspost/compress v1.20.4
	gonum.org/v1/gonum v0.17.0
)
