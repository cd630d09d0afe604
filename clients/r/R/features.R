# Communities as the GeoJSON text the server reads. File contents are sent as they are, so the server sees
# the very coordinates of the file (no rounding on the way through R).

geojson_features <- function(features, id_column = NULL) {
  if (inherits(features, "sf")) return(sf_features(features, id_column))
  if (is.character(features) && length(features) == 1L) {
    if (!file.exists(features)) {
      stop("features file ", deparse(features), " does not exist", call. = FALSE)
    }
    if (grepl("\\.(geo)?json$", features, ignore.case = TRUE)) {
      text <- paste(readLines(features, warn = FALSE, encoding = "UTF-8"), collapse = "\n")
      parsed <- tryCatch(jsonlite::parse_json(text, simplifyVector = FALSE), error = function(e) {
        stop("features file ", deparse(features), " is not JSON: ", conditionMessage(e), call. = FALSE)
      })
      if (!identical(parsed$type, "FeatureCollection") && !identical(parsed$type, "Feature")) {
        stop("features file ", deparse(features), " is not a GeoJSON FeatureCollection or Feature",
             call. = FALSE)
      }
      return(list(text = text, count = feature_count(parsed), crs = NULL, id_property = id_column))
    }
    if (!requireNamespace("sf", quietly = TRUE)) {
      stop("reading ", deparse(features), " needs the sf package; or give a GeoJSON file", call. = FALSE)
    }
    return(sf_features(sf::st_read(features, quiet = TRUE), id_column))
  }
  if (is.list(features) && !is.null(features$type)) {
    # Already parsed GeoJSON: numbers go out with 15 significant digits (jsonlite's most).
    text <- as.character(jsonlite::toJSON(features, auto_unbox = TRUE, digits = NA, null = "null"))
    return(list(text = text, count = feature_count(features), crs = NULL, id_property = id_column))
  }
  stop("features must be an sf data frame, a GeoJSON file path or a parsed GeoJSON list, not ",
       class(features)[1], call. = FALSE)
}

feature_count <- function(collection) {
  if (identical(collection$type, "FeatureCollection")) length(collection$features) else 1L
}

# An sf data frame as GeoJSON written by GDAL in the frame's own CRS, each feature's id from the id column
# (id_column, else "feature_id" or "id"). The CRS goes along by EPSG code (or WKT) unless it is WGS84.
sf_features <- function(frame, id_column = NULL) {
  if (!requireNamespace("sf", quietly = TRUE)) stop("sf data frames need the sf package", call. = FALSE)
  column <- id_column %||% intersect(c("feature_id", "id"), names(frame))[1]
  if (is.null(column) || is.na(column) || !column %in% names(frame)) {
    stop("the sf data frame has no id column ", deparse(id_column %||% "feature_id or id"),
         " (columns: ", paste(setdiff(names(frame), attr(frame, "sf_column")), collapse = ", "),
         "); pass id_column = NAME", call. = FALSE)
  }
  ids <- as.character(sf::st_drop_geometry(frame)[[column]])
  if (anyNA(ids) || anyDuplicated(ids)) {
    stop("id column ", deparse(column), " has missing or repeated ids (repeated: ",
         paste(utils::head(unique(ids[duplicated(ids)]), 5), collapse = ", "),
         "); each community needs its own id", call. = FALSE)
  }
  frame[[column]] <- ids
  crs <- sf::st_crs(frame)
  crs_text <- NULL
  if (!is.na(crs)) {
    epsg <- crs$epsg
    if (is.null(epsg) || is.na(epsg)) {
      crs_text <- crs$wkt
    } else if (epsg != 4326) {
      crs_text <- paste0("EPSG:", epsg)
    }
  }
  path <- tempfile(fileext = ".geojson")
  on.exit(unlink(path))
  sf::st_write(frame, path, driver = "GeoJSON", quiet = TRUE,
               layer_options = c(paste0("ID_FIELD=", column), "ID_TYPE=String", "RFC7946=NO",
                                 "WRITE_NAME=NO"))
  text <- paste(readLines(path, warn = FALSE, encoding = "UTF-8"), collapse = "\n")
  list(text = text, count = nrow(frame), crs = crs_text, id_property = NULL)
}
