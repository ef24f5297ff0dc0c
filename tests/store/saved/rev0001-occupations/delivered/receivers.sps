H00 SPS format version num.     SPS 2.1 (receiver points only)                  
H01 Description of survey area  Kestrel Flats 3D                                
H02 Date of survey              2025-04-07 to 2025-04-09 (occupations, UTC)     
H021Post-plot date of issue     2026-12-03 04:45:06 UTC                         
H03 Client                                                                      
H04 Geophysical contractor                                                      
H07 Positioning software        nodekeep 0.2.0                                  
H08 Coordinate location         receiver position as solved                     
H10 Clock time w.r.t. GMT       0 (all times UTC)                               
H12 Geodetic datum,-spheroid    World Geodetic System 1984 ensemble, WGS 84     
H13 Coordinate reference system EPSG:32614 WGS 84 / UTM zone 14N                
H14 Geodetic datum parameters   a=6378137.000 1/f=298.257223563                 
H17 Vertical datum              NAVD88                                          
H18 Projection type             Transverse Mercator (EPSG method 9807)          
H19 Projection zone             WGS 84 / UTM zone 14N                           
H20 Description of grid units   metre                                           
H201Factor to metre             1.0                                             
H21 Standard parallel(s)        none (origin lat 0 degree)                      
H22 Central meridian            -99 degree                                      
H231Grid origin                 lat 0 degree, lon -99 degree                    
H232Grid coord. at origin       E 500000 metre, N 0 metre                       
H241Scale factor                0.9996 unity                                    
H242Lat/long of scale factor    lat 0 degree, lon -99 degree                    
H26 Projection parameter        Latitude of natural origin = 0 degree           
H26 Projection parameter        Longitude of natural origin = -99 degree        
H26 Projection parameter        Scale factor at natural origin = 0.9996 unity   
H26 Projection parameter        False easting = 500000 metre                    
H26 Projection parameter        False northing = 0 metre                        
H26 Position mapped             receiver (node) as solved from its GNSS fixes   
H26 Day/time columns 72-80      UTC, when the node was laid out (deployment log)
H26 Point index column 24       one per occupation of the station (a node       
H26 (continued)                 deployed there), numbered in order of           
H26 (continued)                 deployment; the lineage manifest gives each     
H26 (continued)                 one's node and window                           
H26 Units and precision         E/N metre to 0.1, elevation metre to 0.1        
H26 Producing run               dcbad3903fac9d84e3448fd0af6ec2e15522520703a924ae
H26 (continued)                 4a04f013c296c961                                
H26 Edit set                    2473fcaba17be8f3ee7195620c2f0356715b343ed9c0f42f
H26 (continued)                 5457ae6a95f57788                                
H26 Edit ids in force           1                                               
H26 Not a certified survey      for seismic processing, not legal/setback use   
R   1001.00   5001.00  1                       583200.0 4062399.9 440.0 97120000
R   1001.00   5002.00  1                       583206.9 4062449.6 439.9 97120000
R   1001.00   5002.00  2                       583210.3 4062452.3 440.0 98100000
R   1001.00   5003.00  1                       583214.4 4062499.3 411.5 97120000
