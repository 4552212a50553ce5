/* JPEG and PNG decoding through Debian's libjpeg-turbo and libpng. Both
 * libraries report errors by longjmp; each decoder keeps every object that
 * must be freed on the error path in a struct the handler can reach, and
 * refuses the picture's size before allocating pixels. Warnings (a
 * truncated JPEG, a bad CRC in a PNG's ancillary chunk) are errors: a
 * damaged file should be noticed, not trained on as a partly grey picture. */
#include <setjmp.h>
#include <stdio.h>
#include <string.h>

#include <jpeglib.h>
#include <png.h>

#include "core/alloc.h"
#include "core/status.h"
#include "recoup/image.h"

void rc_image_free(rc_image *im) {
  if (!im) return;
  rc__free(im->px);
  memset(im, 0, sizeof *im);
}

static rc_status check_size(int64_t w, int64_t h, int64_t max_pixels, const char *name, rc_err *e) {
  if (w <= 0 || h <= 0) return rc__fail(e, RC_ERR_FORMAT, "%s: image of %lldx%lld pixels", name, (long long)w, (long long)h);
  if (w > max_pixels / h)
    return rc__fail(e, RC_ERR_LIMIT, "%s: image of %lldx%lld pixels is over the limit of %lld pixels", name,
                    (long long)w, (long long)h, (long long)max_pixels);
  return RC_OK;
}

/* ---- JPEG ---------------------------------------------------------------- */

typedef struct jpeg_fail {
  struct jpeg_error_mgr mgr;
  jmp_buf jump;
  char msg[JMSG_LENGTH_MAX];
} jpeg_fail;

static void jpeg_on_error(j_common_ptr cinfo) {
  jpeg_fail *f = (jpeg_fail *)cinfo->err;
  (*cinfo->err->format_message)(cinfo, f->msg);
  longjmp(f->jump, 1);
}

static void jpeg_on_message(j_common_ptr cinfo, int level) {
  if (level < 0) jpeg_on_error(cinfo); /* a warning: corrupt or truncated data */
}

static rc_status decode_jpeg(rc_image *out, const unsigned char *buf, size_t n, const char *name, int64_t max_pixels,
                             rc_err *e) {
  struct jpeg_decompress_struct cinfo;
  jpeg_fail fail;
  /* volatile: assigned after setjmp and read after the longjmp returns. */
  uint8_t *volatile px = NULL;
  memset(&cinfo, 0, sizeof cinfo);
  memset(&fail, 0, sizeof fail);
  cinfo.err = jpeg_std_error(&fail.mgr);
  fail.mgr.error_exit = jpeg_on_error;
  fail.mgr.emit_message = jpeg_on_message;
  if (setjmp(fail.jump)) {
    jpeg_destroy_decompress(&cinfo);
    rc__free(px);
    return rc__fail(e, RC_ERR_FORMAT, "%s: damaged JPEG: %s", name, fail.msg);
  }
  jpeg_create_decompress(&cinfo);
  jpeg_mem_src(&cinfo, buf, (unsigned long)n);
  jpeg_read_header(&cinfo, TRUE);
  rc_status st = check_size(cinfo.image_width, cinfo.image_height, max_pixels, name, e);
  if (st == RC_OK && cinfo.jpeg_color_space == JCS_CMYK)
    st = rc__fail(e, RC_ERR_UNSUPPORTED, "%s: CMYK JPEG; convert it to RGB first", name);
  if (st == RC_OK && cinfo.jpeg_color_space == JCS_YCCK)
    st = rc__fail(e, RC_ERR_UNSUPPORTED, "%s: YCCK JPEG; convert it to RGB first", name);
  if (st != RC_OK) {
    jpeg_destroy_decompress(&cinfo);
    return st;
  }
  int c = cinfo.num_components == 1 ? 1 : 3;
  cinfo.out_color_space = c == 1 ? JCS_GRAYSCALE : JCS_RGB;
  jpeg_start_decompress(&cinfo);
  size_t w = cinfo.output_width, h = cinfo.output_height;
  px = rc__malloc(w * h * (size_t)c);
  if (!px) {
    jpeg_destroy_decompress(&cinfo);
    return rc__fail(e, RC_ERR_NOMEM, "%s: out of memory for %zux%zu pixels", name, w, h);
  }
  while (cinfo.output_scanline < cinfo.output_height) {
    JSAMPROW row = px + (size_t)cinfo.output_scanline * w * (size_t)c;
    jpeg_read_scanlines(&cinfo, &row, 1);
  }
  jpeg_finish_decompress(&cinfo);
  jpeg_destroy_decompress(&cinfo);
  out->w = (int)w;
  out->h = (int)h;
  out->c = c;
  out->px = px;
  return RC_OK;
}

/* ---- PNG ----------------------------------------------------------------- */

typedef struct png_src {
  const unsigned char *p;
  size_t n, at;
  char msg[256];
} png_src;

static void png_on_read(png_structp png, png_bytep dst, png_size_t len) {
  png_src *s = png_get_io_ptr(png);
  if (len > s->n - s->at) png_error(png, "file ends early (truncated)");
  memcpy(dst, s->p + s->at, len);
  s->at += len;
}

static void png_on_error(png_structp png, png_const_charp msg) {
  png_src *s = png_get_error_ptr(png);
  snprintf(s->msg, sizeof s->msg, "%s", msg);
  png_longjmp(png, 1);
}

static void png_on_warning(png_structp png, png_const_charp msg) {
  png_on_error(png, msg);
}

static rc_status decode_png(rc_image *out, const unsigned char *buf, size_t n, const char *name, int64_t max_pixels,
                            rc_err *e) {
  png_src src = {buf, n, 0, {0}};
  png_structp png = png_create_read_struct(PNG_LIBPNG_VER_STRING, &src, png_on_error, png_on_warning);
  if (!png) return rc__fail(e, RC_ERR_NOMEM, "%s: out of memory starting the PNG reader", name);
  png_infop info = png_create_info_struct(png);
  uint8_t *volatile px = NULL;
  png_bytep *volatile rows = NULL;
  volatile rc_status st = RC_OK;
  if (setjmp(png_jmpbuf(png))) {
    png_destroy_read_struct(&png, &info, NULL);
    rc__free(px);
    rc__free(rows);
    if (st != RC_OK) return st;
    return rc__fail(e, RC_ERR_FORMAT, "%s: damaged PNG: %s", name, src.msg);
  }
  if (!info) png_error(png, "out of memory");
  png_set_read_fn(png, &src, png_on_read);
  /* Refuse huge headers here too, before libpng allocates a row. */
  png_set_user_limits(png, 1u << 20, 1u << 20);
  png_read_info(png, info);
  png_uint_32 w = png_get_image_width(png, info), h = png_get_image_height(png, info);
  rc_status size_st = check_size(w, h, max_pixels, name, e);
  if (size_st != RC_OK) {
    st = size_st;
    png_longjmp(png, 1);
  }
  int type = png_get_color_type(png, info), depth = png_get_bit_depth(png, info);
  if (type == PNG_COLOR_TYPE_PALETTE) png_set_palette_to_rgb(png);
  if (type == PNG_COLOR_TYPE_GRAY && depth < 8) png_set_expand_gray_1_2_4_to_8(png);
  if (depth == 16) png_set_strip_16(png);
  if (type & PNG_COLOR_MASK_ALPHA) png_set_strip_alpha(png);
  png_set_interlace_handling(png);
  png_read_update_info(png, info);
  int c = png_get_channels(png, info);
  if (c != 1 && c != 3) png_error(png, "unexpected channel count after expansion");
  size_t row_bytes = png_get_rowbytes(png, info);
  if (row_bytes != (size_t)w * (size_t)c) png_error(png, "unexpected row size after expansion");
  px = rc__malloc(row_bytes * h);
  rows = rc__malloc(sizeof(png_bytep) * h);
  if (!px || !rows) {
    st = rc__fail(e, RC_ERR_NOMEM, "%s: out of memory for %ux%u pixels", name, (unsigned)w, (unsigned)h);
    png_longjmp(png, 1);
  }
  for (png_uint_32 y = 0; y < h; y++) rows[y] = px + (size_t)y * row_bytes;
  png_read_image(png, rows);
  png_read_end(png, NULL);
  png_destroy_read_struct(&png, &info, NULL);
  rc__free(rows);
  out->w = (int)w;
  out->h = (int)h;
  out->c = c;
  out->px = px;
  return RC_OK;
}

rc_status rc_image_decode(rc_image *out, const void *buf, size_t n, const char *name, int64_t max_pixels,
                          rc_err *e) {
  const unsigned char *p = buf;
  memset(out, 0, sizeof *out);
  if (max_pixels <= 0) max_pixels = RC_IMAGE_MAX_PIXELS;
  if (n == 0) return rc__fail(e, RC_ERR_FORMAT, "%s: empty file, not an image", name);
  if (n >= 3 && p[0] == 0xFF && p[1] == 0xD8 && p[2] == 0xFF) return decode_jpeg(out, p, n, name, max_pixels, e);
  if (n >= 8 && !memcmp(p, "\x89PNG\r\n\x1a\n", 8)) return decode_png(out, p, n, name, max_pixels, e);
  return rc__fail(e, RC_ERR_FORMAT, "%s: neither JPEG nor PNG (by its first bytes)", name);
}
