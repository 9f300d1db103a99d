module github.com/beliefd/beliefd

go 1.26.8
