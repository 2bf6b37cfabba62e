package main

import (
	_ "github.com/apache/arrow-go/v18/arrow/memory"
	_ "github.com/apache/arrow-go/v18/parquet/file"
	_ "github.com/apache/arrow-go/v18/parquet/pqarrow"
	_ "github.com/santhosh-tekuri/jsonschema/v6"
)
