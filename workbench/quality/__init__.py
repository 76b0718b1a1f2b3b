"""Quality: PSNR and SSIM, what an image's owner measures (spots, regions, edges), BD-rate,
and the standard codecs we compare against."""
