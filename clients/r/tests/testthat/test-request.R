# The request in R's words becomes the request's JSON; no server needed.

test_that("R shorthands become the request's forms", {
  fields <- wxshock:::request_fields(
    dataset = "demo", years = c(1991, 2020), baseline = 10, season = 5:10,
    indicators = list("prcp_total", list(name = "gdd", base = 8)), lags = 0, classes = c(-1.5, 1.5),
    pairs = list(c("prcp_total", "tmean")), weighting = "centers"
  )
  json <- jsonlite::fromJSON(as.character(jsonlite::toJSON(fields, auto_unbox = TRUE, digits = NA)),
                             simplifyVector = FALSE)
  expect_equal(json$years, list(start = 1991L, end = 2020L))
  expect_equal(json$baseline, list(trailing = 10L))
  expect_equal(unlist(json$season$months), 5:10)
  expect_equal(json$lags, list(0L))            # a list even with one lag
  expect_equal(json$indicators[[2]], list(name = "gdd", base = 8L))
  expect_equal(unlist(json$classes$edges), c(-1.5, 1.5))
  expect_equal(json$pairs, list(list("prcp_total", "tmean")))
  expect_equal(json$weighting, "centers")
  window <- wxshock:::request_fields(season = c("11-01", "03-31"), baseline = c(1981, 1990))
  expect_equal(window$season, list(start = "11-01", end = "03-31"))
  expect_equal(window$baseline, list(start = 1981L, end = 1990L))
})

test_that("a GeoJSON file goes out exactly as written", {
  path <- tempfile(fileext = ".geojson")
  text <- paste0('{"type": "FeatureCollection", "features": [{"type": "Feature", "id": "v-1", ',
                 '"properties": {}, "geometry": {"type": "Point", "coordinates": [12.123456789012345678, 4.1]}}]}')
  writeLines(text, path)
  features <- wxshock:::geojson_features(path)
  body <- wxshock:::request_body(features, wxshock:::request_fields(lags = c(0, 1)))
  expect_true(grepl("12.123456789012345678", body, fixed = TRUE))  # not rounded to 15 digits
  parsed <- jsonlite::fromJSON(body, simplifyVector = FALSE)
  expect_equal(parsed$features$features[[1]]$id, "v-1")
  expect_equal(parsed$lags, list(0L, 1L))
  expect_error(wxshock:::geojson_features(tempfile()), "does not exist")
})

test_that("a problem document becomes a condition with its fields", {
  problem <- list(type = "https://wxshock.example/problems/unknown-indicator", title = "Unknown indicator",
                  status = 422L, detail = "unknown indicator 'prcp_totl'; did you mean 'prcp_total'?",
                  pointer = "/indicators/0")
  condition <- wxshock:::problem_condition(problem, 422L)
  expect_s3_class(condition, "wxshock_problem_unknown_indicator")
  expect_s3_class(condition, "wxshock_problem")
  expect_equal(condition$pointer, "/indicators/0")
  expect_equal(condition$status, 422L)
  expect_match(conditionMessage(condition), "did you mean 'prcp_total'\\? \\[at /indicators/0\\]")
  expect_error(stop(condition), class = "wxshock_problem")
})
